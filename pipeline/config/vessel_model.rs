//! Which vessel model a joint multiband method fits, as a study file
//! names it: the base model, a set of its extensions, or `auto`. The
//! physics behind each name is in [`crate::oximetry::model`].

/// The base model's extensions, each one shared parameter.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    Hash,
    PartialOrd,
    Ord,
    serde::Serialize,
    serde::Deserialize,
)]
pub struct Extensions {
    pub veil_slope: bool,
    pub backscatter: bool,
    pub fundus: bool,
}

/// The extensions' names, as a study file writes them.
pub const EXTENSION_NAMES: [&str; 3] = ["veil-slope", "backscatter-spectrum", "fundus-slope"];

impl Extensions {
    pub const BASE: Extensions = Extensions {
        veil_slope: false,
        backscatter: false,
        fundus: false,
    };

    pub fn flags(self) -> [bool; 3] {
        [self.veil_slope, self.backscatter, self.fundus]
    }

    /// From the flags in [`EXTENSION_NAMES`] order.
    pub fn from_flags(f: [bool; 3]) -> Self {
        Extensions {
            veil_slope: f[0],
            backscatter: f[1],
            fundus: f[2],
        }
    }

    /// By name, for a study file.
    pub fn with(self, name: &str) -> Option<Self> {
        let i = EXTENSION_NAMES.iter().position(|n| *n == name)?;
        let mut f = self.flags();
        f[i] = true;
        Some(Self::from_flags(f))
    }

    /// `base`, or the extensions' names joined by `+`.
    pub fn name(self) -> String {
        let on: Vec<&str> = EXTENSION_NAMES
            .iter()
            .zip(self.flags())
            .filter(|(_, f)| *f)
            .map(|(n, _)| *n)
            .collect();
        if on.is_empty() {
            "base".into()
        } else {
            on.join("+")
        }
    }

    pub fn count(self) -> usize {
        self.flags().iter().filter(|f| **f).count()
    }

    /// Every combination, base first, then by number of extensions.
    pub fn all() -> Vec<Extensions> {
        let mut v: Vec<Extensions> = (0..8)
            .map(|i| Self::from_flags([i & 1 != 0, i & 2 != 0, i & 4 != 0]))
            .collect();
        v.sort_by_key(|e| (e.count(), std::cmp::Reverse(e.flags())));
        v
    }
}

/// Which vessel model a joint multiband method fits.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum ModelChoice {
    /// The base model with these extensions.
    Fixed(Extensions),
    /// Per segment, the supported combination with the smallest
    /// information criterion.
    Auto,
}

impl ModelChoice {
    pub fn name(self) -> String {
        match self {
            ModelChoice::Fixed(e) => e.name(),
            ModelChoice::Auto => "auto".into(),
        }
    }
}
