//! TEMPORARY shim until the real module lands (helper replaces this file).
/// Arguments of `tamis corpus`.
#[derive(clap::Args, Debug)]
pub struct CorpusArgs {}
/// Runs `tamis corpus`.
pub fn run(_args: &CorpusArgs) -> anyhow::Result<()> { anyhow::bail!("not yet") }
