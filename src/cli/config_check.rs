//! `tamis config check FILE`: validates a configuration file without starting anything.

use std::path::PathBuf;

use crate::config::Config;

use super::input::BadInput;

/// Subcommands of `tamis config`.
#[derive(clap::Subcommand, Debug)]
pub enum ConfigCommand {
    /// Parse and validate a configuration file; errors name the line and column.
    Check {
        /// The TOML configuration file.
        #[arg(value_name = "FILE")]
        file: PathBuf,
    },
}

/// Runs `tamis config ...`.
pub fn run(command: &ConfigCommand) -> anyhow::Result<u8> {
    match command {
        ConfigCommand::Check { file } => {
            let config = Config::load(file).map_err(|e| BadInput(e.to_string()))?;
            let model = match &config.model {
                crate::config::ModelSource::File(p) => p.display().to_string(),
                crate::config::ModelSource::Builtin => "built-in demonstration model".to_string(),
            };
            println!(
                "{}: valid ({} recipient-domain policies, model: {model}, tag-only: {})",
                file.display(),
                config.policy.domains().len(),
                config.policy.tag_only()
            );
            Ok(super::EXIT_OK)
        }
    }
}
