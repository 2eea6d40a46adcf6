//! The two classes a message can belong to.

use serde::{Deserialize, Serialize};

/// Whether a message is junk (`Spam`) or legitimate mail (`Ham`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Label {
    /// Unwanted mail: the positive class.
    Spam,
    /// Legitimate mail: the negative class, whose misclassification costs most.
    Ham,
}

impl Label {
    /// The label as written in label files and reports: `spam` or `ham`.
    pub fn as_str(self) -> &'static str {
        match self {
            Label::Spam => "spam",
            Label::Ham => "ham",
        }
    }
}
