//! Model matrices from a table: the response, fixed effects (factors get
//! treatment contrasts against a reference level, numbers enter as they
//! are), random terms (a grouping factor, or an interaction of several as
//! `subject:eye`, with optional random slopes), and contrasts written with
//! level names (`hypoxia - recovery`).

use std::collections::BTreeSet;
use std::path::Path;

use nalgebra::DMatrix;

use super::lmm::{LmmData, RandomTerm};
use crate::config::contrast::{ContrastError, parse_terms};
use crate::config::csvfile::CsvTable;
use crate::config::diag::{Findings, Mark};

/// Why a model term or a contrast could not be read.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DesignError {
    #[error(
        "`{0}`: write a grouping column, `a:b` for groups nested in groups, `group@slope` for a random slope"
    )]
    RandomTerm(String),
    #[error("`{0}` is not a level of any fixed factor")]
    UnknownLevel(String),
    #[error("`{0}` is a level of more than one factor")]
    AmbiguousLevel(String),
    #[error(transparent)]
    Contrast(#[from] ContrastError),
}

/// A random term: grouping columns joined by `:`, slope columns after `@`.
#[derive(Debug, Clone, PartialEq)]
pub struct RandomSpec {
    pub groups: Vec<String>,
    pub slopes: Vec<String>,
}

impl RandomSpec {
    /// Parses `subject`, `subject:eye`, `Subject@Days`.
    pub fn parse(s: &str) -> Result<Self, DesignError> {
        let (g, sl) = match s.split_once('@') {
            Some((g, sl)) => (
                g,
                sl.split(',')
                    .map(|x| x.trim().to_string())
                    .filter(|x| !x.is_empty())
                    .collect(),
            ),
            None => (s, Vec::new()),
        };
        let groups: Vec<String> = g.split(':').map(|x| x.trim().to_string()).collect();
        if groups.iter().any(|x| x.is_empty()) {
            return Err(DesignError::RandomTerm(s.to_string()));
        }
        Ok(RandomSpec { groups, slopes: sl })
    }

    pub fn name(&self) -> String {
        self.groups.join(":")
    }
}

#[derive(Debug, Clone)]
pub struct Spec {
    pub response: String,
    pub fixed: Vec<String>,
    pub random: Vec<RandomSpec>,
    /// (column, reference level).
    pub reference: Vec<(String, String)>,
}

/// A categorical fixed effect: its levels (reference first) and the columns of X it owns.
#[derive(Debug, Clone)]
pub struct Factor {
    pub column: String,
    pub levels: Vec<String>,
    /// X column of each non-reference level.
    pub x_columns: Vec<usize>,
}

pub struct Design {
    pub data: LmmData,
    pub factors: Vec<Factor>,
}

fn column(t: &CsvTable, file: &Path, name: &str, f: &mut Findings) -> Option<Vec<String>> {
    let c = t.column(file, name, "the data", f)?;
    Some(
        t.rows
            .iter()
            .map(|r| r.field(c).map(|x| x.0.to_string()).unwrap_or_default())
            .collect(),
    )
}

fn numeric(v: &[String]) -> Option<Vec<f64>> {
    v.iter()
        .map(|s| s.parse::<f64>().ok().filter(|x| x.is_finite()))
        .collect()
}

/// Builds the design; problems are findings against `file`.
pub fn build(t: &CsvTable, file: &Path, spec: &Spec, f: &mut Findings) -> Option<Design> {
    let n = t.rows.len();
    let y_raw = column(t, file, &spec.response, f)?;
    let Some(y) = numeric(&y_raw) else {
        let bad = y_raw
            .iter()
            .position(|s| s.parse::<f64>().map(|v| !v.is_finite()).unwrap_or(true))
            .unwrap_or(0);
        f.error(
            file,
            Some(Mark::new(t.rows[bad].line, 1)),
            format!(
                "response `{}` is not a number here: `{}`",
                spec.response, y_raw[bad]
            ),
        )
        .hint("remove or fill rows without a response");
        return None;
    };
    let mut cols: Vec<Vec<f64>> = vec![vec![1.0; n]];
    let mut names = vec!["(Intercept)".to_string()];
    let mut factors = Vec::new();
    for fx in &spec.fixed {
        let raw = column(t, file, fx, f)?;
        if let Some(v) = numeric(&raw) {
            cols.push(v);
            names.push(fx.clone());
            continue;
        }
        let mut levels: Vec<String> = raw
            .iter()
            .cloned()
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect();
        if let Some((_, r)) = spec.reference.iter().find(|(c, _)| c == fx) {
            match levels.iter().position(|l| l == r) {
                Some(i) => {
                    let lv = levels.remove(i);
                    levels.insert(0, lv);
                }
                None => {
                    f.error(
                        file,
                        None,
                        format!("`--reference {fx}={r}`: `{r}` is not a level of `{fx}`"),
                    )
                    .hint(format!("levels: {}", levels.join(", ")));
                    return None;
                }
            }
        }
        let mut xc = Vec::new();
        for lv in &levels[1..] {
            xc.push(cols.len());
            cols.push(
                raw.iter()
                    .map(|s| if s == lv { 1.0 } else { 0.0 })
                    .collect(),
            );
            names.push(format!("{fx}={lv}"));
        }
        factors.push(Factor {
            column: fx.clone(),
            levels,
            x_columns: xc,
        });
    }
    let x = DMatrix::from_fn(n, cols.len(), |i, j| cols[j][i]);
    let mut terms = Vec::new();
    for r in &spec.random {
        let mut keys = vec![String::new(); n];
        for g in &r.groups {
            let v = column(t, file, g, f)?;
            for i in 0..n {
                if !keys[i].is_empty() {
                    keys[i].push(':');
                }
                keys[i].push_str(&v[i]);
            }
        }
        let levels: Vec<String> = keys
            .iter()
            .cloned()
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect();
        let group = keys
            .iter()
            .map(|k| levels.binary_search(k).expect("level present"))
            .collect();
        let mut columns = vec![vec![1.0; n]];
        let mut cn = vec!["(Intercept)".to_string()];
        for s in &r.slopes {
            let raw = column(t, file, s, f)?;
            let Some(v) = numeric(&raw) else {
                f.error(
                    file,
                    None,
                    format!("random slope `{s}` must be a numeric column"),
                );
                return None;
            };
            columns.push(v);
            cn.push(s.clone());
        }
        terms.push(RandomTerm {
            name: r.name(),
            levels,
            group,
            column_names: cn,
            columns,
        });
    }
    Some(Design {
        data: LmmData {
            y,
            x,
            x_names: names,
            terms,
        },
        factors,
    })
}

impl Design {
    /// Weights of a contrast written with level names, e.g. `hypoxia - recovery`
    /// (the grammar of [`crate::config::contrast`]).
    pub fn contrast(&self, text: &str) -> Result<Vec<f64>, DesignError> {
        let mut l = vec![0.0; self.data.x.ncols()];
        for (name, w) in parse_terms(text)? {
            let hits: Vec<(&Factor, usize)> = self
                .factors
                .iter()
                .filter_map(|fa| fa.levels.iter().position(|lv| *lv == name).map(|i| (fa, i)))
                .collect();
            match hits.as_slice() {
                [] => return Err(DesignError::UnknownLevel(name)),
                [(fa, i)] => {
                    if *i > 0 {
                        l[fa.x_columns[i - 1]] += w;
                    }
                }
                _ => return Err(DesignError::AmbiguousLevel(name)),
            }
        }
        Ok(l)
    }
}
