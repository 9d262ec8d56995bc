//! Contrast expressions, one grammar for the protocol's `contrasts` and for
//! `satstep mixed --contrast`: terms `name` or `weight*name` joined by ` + `
//! and ` - ` with spaces around the operators (names such as `low-15`
//! contain hyphens), e.g. `low-15 - air` or `0.5*low-15 + 0.5*low-12 - air`.
//! What a name refers to (an epoch, a factor level) is the caller's.

/// Why an expression could not be read.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ContrastError {
    /// A name that is not one of the caller's.
    #[error("`{0}` is not a level")]
    Unknown(String),
    #[error("{0}")]
    Syntax(String),
}

/// The expression's terms in written order, each name once with its
/// weights added up (`a - b + a` gives `a: 2, b: -1`).
pub(crate) fn parse_terms(text: &str) -> Result<Vec<(String, f64)>, ContrastError> {
    let tokens: Vec<&str> = text.split_whitespace().collect();
    if tokens.is_empty() {
        return Err(ContrastError::Syntax("it is empty".into()));
    }
    let mut terms: Vec<(String, f64)> = Vec::new();
    let mut sign = 1.0;
    let mut expect_term = true;
    for tok in tokens {
        if expect_term {
            let (coef, name) = match tok.split_once('*') {
                Some((c, n)) => {
                    let c: f64 = c
                        .parse()
                        .map_err(|_| ContrastError::Syntax(format!("`{c}` is not a number")))?;
                    (c, n)
                }
                None => (1.0, tok),
            };
            match terms.iter_mut().find(|(n, _)| n == name) {
                Some((_, w)) => *w += sign * coef,
                None => terms.push((name.to_string(), sign * coef)),
            }
            expect_term = false;
        } else {
            sign = match tok {
                "+" => 1.0,
                "-" => -1.0,
                _ => {
                    return Err(ContrastError::Syntax(format!(
                        "expected `+` or `-` before `{tok}`"
                    )));
                }
            };
            expect_term = true;
        }
    }
    if expect_term {
        return Err(ContrastError::Syntax("it ends with an operator".into()));
    }
    Ok(terms)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn terms_keep_order_and_add_repeats() {
        assert_eq!(
            parse_terms("0.5*low-15 + 0.5*low-12 - air").unwrap(),
            vec![
                ("low-15".to_string(), 0.5),
                ("low-12".to_string(), 0.5),
                ("air".to_string(), -1.0)
            ]
        );
        assert_eq!(
            parse_terms("a - b + a").unwrap(),
            vec![("a".to_string(), 2.0), ("b".to_string(), -1.0)]
        );
        for bad in ["", "a -", "a b", "x*a - b", "- a"] {
            assert!(
                matches!(parse_terms(bad), Err(ContrastError::Syntax(_))),
                "{bad}"
            );
        }
    }
}
