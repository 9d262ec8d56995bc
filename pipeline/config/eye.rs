//! Which eye: the two values every file that names an eye uses.

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize,
)]
pub enum Eye {
    /// Right eye (oculus dexter).
    OD,
    /// Left eye (oculus sinister).
    OS,
}

impl Eye {
    pub const NAMES: [&'static str; 2] = ["OD", "OS"];
    pub fn from_name(s: &str) -> Option<Eye> {
        match s {
            "OD" => Some(Eye::OD),
            "OS" => Some(Eye::OS),
            _ => None,
        }
    }
    pub fn as_str(&self) -> &'static str {
        match self {
            Eye::OD => "OD",
            Eye::OS => "OS",
        }
    }
}
