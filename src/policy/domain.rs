//! Recipient domains as the policy keys them: lower-case, no trailing dot, checked against
//! the DNS host-name rules (RFC 1035 §2.3.1 as relaxed by RFC 1123 §2.1) or, for
//! internationalised names, any non-ASCII letter in a label.
//!
//! The same normalisation runs on configured section names and on every envelope
//! recipient, so `User@Example.ORG.` and `[policy.domains."example.org"]` meet.

/// Longest domain name in characters, without the trailing dot (RFC 1035 §2.3.4).
const MAX_NAME: usize = 253;
/// Longest label in characters (RFC 1035 §2.3.4).
const MAX_LABEL: usize = 63;

/// The domain part of an envelope recipient, normalised: the text after the last `@`,
/// lower-cased, one trailing dot removed. `None` when the address has no `@` or nothing
/// after it; such recipients fall under the default section.
pub fn recipient_domain(address: &str) -> Option<String> {
    let (_, domain) = address.rsplit_once('@')?;
    let domain = normalize(domain);
    if domain.is_empty() {
        None
    } else {
        Some(domain)
    }
}

/// Lower-cases a domain name and removes one trailing dot.
pub fn normalize(domain: &str) -> String {
    let trimmed = domain.strip_suffix('.').unwrap_or(domain);
    trimmed.to_lowercase()
}

/// Normalises and checks a configured domain name; the error says what is wrong.
pub fn validate(domain: &str) -> Result<String, String> {
    let name = normalize(domain);
    if name.is_empty() {
        return Err("the domain name is empty".to_string());
    }
    if name.chars().count() > MAX_NAME {
        return Err(format!(
            "the domain name is longer than {MAX_NAME} characters"
        ));
    }
    for label in name.split('.') {
        if label.is_empty() {
            return Err(
                "the domain name has an empty label (two dots in a row, or a leading dot)"
                    .to_string(),
            );
        }
        if label.chars().count() > MAX_LABEL {
            return Err(format!(
                "the label `{label}` is longer than {MAX_LABEL} characters"
            ));
        }
        if label.starts_with('-') || label.ends_with('-') {
            return Err(format!("the label `{label}` starts or ends with a hyphen"));
        }
        if let Some(bad) = label.chars().find(|&c| {
            !(c.is_ascii_alphanumeric() || c == '-' || (!c.is_ascii() && c.is_alphanumeric()))
        }) {
            return Err(format!(
                "the character {bad:?} is not allowed in a domain name (letters, digits and hyphens only)"
            ));
        }
    }
    Ok(name)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recipient_domain_takes_the_part_after_the_last_at() {
        assert_eq!(
            recipient_domain("\"odd@local\"@Mail.Example.ORG."),
            Some("mail.example.org".to_string())
        );
        assert_eq!(recipient_domain("postmaster"), None);
        assert_eq!(recipient_domain("someone@"), None);
        assert_eq!(recipient_domain("someone@."), None);
    }

    #[test]
    fn validate_accepts_host_names_and_refuses_the_rest() {
        assert_eq!(validate("Example.ORG."), Ok("example.org".to_string()));
        assert_eq!(
            validate("xn--bcher-kva.test"),
            Ok("xn--bcher-kva.test".to_string())
        );
        assert_eq!(validate("bücher.test"), Ok("bücher.test".to_string()));
        assert_eq!(validate("localhost"), Ok("localhost".to_string()));
        for bad in [
            "",
            ".",
            "a..test",
            ".a.test",
            "-a.test",
            "a-.test",
            "under_score.test",
            "sp ace.test",
            "user@example.org",
        ] {
            assert!(validate(bad).is_err(), "{bad:?} should be refused");
        }
        let long_label = format!("{}.test", "a".repeat(64));
        assert!(validate(&long_label).is_err());
        let long_name = vec!["abcdefghi"; 26].join(".");
        assert!(validate(&long_name).is_err());
    }
}
