//! The ordering of model version strings.
//!
//! A version is one or more parts separated by `.`; each part is ASCII letters, digits, `-` or
//! `_`, at most 64 characters in all. Two versions compare part by part from the left:
//! - two parts of digits only compare as numbers (`9 < 10`, and `007 = 7`, so leading zeros
//!   are ignored; `7` and `007` are then told apart by their text, so the order stays total);
//! - a part of digits sorts before any part with other characters (`2.0 < 2.rc1`);
//! - two other parts compare byte by byte (`2026-01-31 < 2026-02-01` for dates written
//!   year-month-day);
//! - when one version runs out of parts first, it is the lower one (`1.2 < 1.2.1`).
//!
//! So `1.9 < 1.10 < 2 < 2.0 < 10`, and a server picks the highest as the active version.

use std::cmp::Ordering;

use thiserror::Error;

/// Longest version string accepted.
pub const MAX_VERSION_LEN: usize = 64;

/// Why a version string is refused.
#[derive(Clone, Debug, PartialEq, Eq, Error)]
pub enum VersionError {
    #[error("version is empty")]
    Empty,
    #[error("version {version:?} is longer than {MAX_VERSION_LEN} characters")]
    TooLong { version: String },
    #[error("version {version:?} has an empty part (two dots, or a dot at either end)")]
    EmptyPart { version: String },
    #[error(
        "version {version:?} contains {found:?}; allowed are ASCII letters, digits, '-', '_' and '.'"
    )]
    BadCharacter { version: String, found: char },
}

/// Checks that `v` follows the version rule.
///
/// # Errors
/// The first rule it breaks.
pub fn validate_version(v: &str) -> Result<(), VersionError> {
    if v.is_empty() {
        return Err(VersionError::Empty);
    }
    if v.len() > MAX_VERSION_LEN {
        return Err(VersionError::TooLong {
            version: v.to_string(),
        });
    }
    if let Some(found) = v
        .chars()
        .find(|c| !(c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.')))
    {
        return Err(VersionError::BadCharacter {
            version: v.to_string(),
            found,
        });
    }
    if v.split('.').any(str::is_empty) {
        return Err(VersionError::EmptyPart {
            version: v.to_string(),
        });
    }
    Ok(())
}

/// Compares two version strings by the rule above. Works on any strings; invalid ones simply
/// compare by the same part rule.
pub fn compare_versions(a: &str, b: &str) -> Ordering {
    let mut pa = a.split('.');
    let mut pb = b.split('.');
    loop {
        match (pa.next(), pb.next()) {
            (None, None) => return a.cmp(b),
            (None, Some(_)) => return Ordering::Less,
            (Some(_), None) => return Ordering::Greater,
            (Some(x), Some(y)) => {
                let ord = compare_part(x, y);
                if ord != Ordering::Equal {
                    return ord;
                }
            }
        }
    }
}

fn is_number(p: &str) -> bool {
    !p.is_empty() && p.bytes().all(|b| b.is_ascii_digit())
}

fn compare_part(x: &str, y: &str) -> Ordering {
    match (is_number(x), is_number(y)) {
        (true, true) => {
            let x = x.trim_start_matches('0');
            let y = y.trim_start_matches('0');
            // Longer digit strings (without leading zeros) are larger numbers; equal lengths
            // compare by digits. No integer parse, so there is no overflow.
            x.len().cmp(&y.len()).then_with(|| x.cmp(y))
        }
        (true, false) => Ordering::Less,
        (false, true) => Ordering::Greater,
        (false, false) => x.cmp(y),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ordering_examples() {
        // The documented chain, checked pairwise.
        let chain = ["1.9", "1.10", "2", "2.0", "2.rc1", "10", "2026-01-31"];
        for w in chain.windows(2) {
            assert_eq!(
                compare_versions(w[0], w[1]),
                Ordering::Less,
                "{} < {}",
                w[0],
                w[1]
            );
            assert_eq!(compare_versions(w[1], w[0]), Ordering::Greater);
        }
        assert_eq!(compare_versions("1.2", "1.2.1"), Ordering::Less);
        assert_eq!(compare_versions("2026-01-31", "2026-02-01"), Ordering::Less);
        assert_eq!(compare_versions("3", "3"), Ordering::Equal);
        // Leading zeros: equal numerically, told apart by text so sorting is total.
        assert_ne!(compare_versions("7", "007"), Ordering::Equal);
        assert_eq!(compare_versions("7", "08"), Ordering::Less);
        // Numbers far beyond u64 still compare.
        assert_eq!(
            compare_versions("99999999999999999999999", "100000000000000000000000"),
            Ordering::Less
        );
    }

    #[test]
    fn validation() {
        assert!(validate_version("1.0.3").is_ok());
        assert!(validate_version("2026-11-30_a").is_ok());
        assert_eq!(validate_version(""), Err(VersionError::Empty));
        assert!(matches!(
            validate_version("1..2"),
            Err(VersionError::EmptyPart { .. })
        ));
        assert!(matches!(
            validate_version("1.2 "),
            Err(VersionError::BadCharacter { .. })
        ));
        assert!(matches!(
            validate_version(&"1".repeat(65)),
            Err(VersionError::TooLong { .. })
        ));
    }
}
