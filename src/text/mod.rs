//! TEMPORARY shim until the real module lands (helper replaces this file).
pub const NORMALIZATION_VERSION: u32 = 1;
#[derive(Default, Debug, Clone)]
pub struct TokenBuffer {
    toks: Vec<String>,
}
impl TokenBuffer {
    pub fn new() -> Self {
        Self::default()
    }
    pub fn clear(&mut self) {
        self.toks.clear()
    }
    pub fn push_text(&mut self, text: &str) {
        for t in text
            .split(|c: char| !c.is_alphanumeric())
            .filter(|t| !t.is_empty())
        {
            self.toks.push(t.to_lowercase())
        }
    }
    pub fn len(&self) -> usize {
        self.toks.len()
    }
    pub fn is_empty(&self) -> bool {
        self.toks.is_empty()
    }
    pub fn get(&self, i: usize) -> Option<&str> {
        self.toks.get(i).map(|s| s.as_str())
    }
    pub fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        self.toks.iter().map(|s| s.as_str())
    }
}
