//! Envelope addresses — the `SENDER` and `RECIPIENT` of PROTOCOL.md §2 — checked against the
//! syntax of RFC 5321 §4.1.2 in a pragmatic form, with the internationalised forms of
//! RFC 6531 (SMTPUTF8).
//!
//! Accepted:
//!
//! - `Local-part "@" Domain`, the local part a dot-string (atoms of RFC 5322 `atext` or
//!   non-ASCII characters, joined by single dots) or a quoted string (printable ASCII, space,
//!   non-ASCII, and `\` pairs);
//! - a domain of dot-separated labels of letters, digits, hyphens and non-ASCII characters,
//!   no label starting or ending with a hyphen, one trailing dot tolerated; or an address
//!   literal in brackets: IPv4, `IPv6:` and an IPv6 address, or a `tag:` general literal;
//! - the bare `postmaster` (any case) as a recipient (RFC 5321 §4.1.1.3);
//! - the empty address as a sender (the null sender, RFC 5321 §4.5.5).
//!
//! Refused: more than [`MAX_ADDRESS`] octets, any control character anywhere, spaces outside
//! quotes, empty atoms or labels, and everything else the grammar does not produce.
//!
//! Invariant: an [`AddressError`] carries positions and sizes, never a part of the address,
//! so it can be sent in a `FAULT` or logged as it is.

use std::net::{Ipv4Addr, Ipv6Addr};

/// Longest address in octets: the 256-octet path of RFC 5321 §4.5.3.1.3 less its two angle
/// brackets, which the protocol does not carry.
pub const MAX_ADDRESS: usize = 254;

/// Which envelope address is checked; they differ in what may stand alone.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    /// `SENDER`: may be empty (the null sender).
    Sender,
    /// `RECIPIENT`: may be the bare `postmaster`.
    Recipient,
}

impl Role {
    /// The frame name, for messages.
    pub fn frame(self) -> &'static str {
        match self {
            Role::Sender => "SENDER",
            Role::Recipient => "RECIPIENT",
        }
    }
}

/// Why an envelope address was refused. Offsets count octets from the start of the address.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AddressError {
    /// Longer than [`MAX_ADDRESS`].
    #[error("the address is {len} octets long, above the {MAX_ADDRESS} of RFC 5321 §4.5.3.1.3")]
    TooLong {
        /// Its length in octets.
        len: usize,
    },
    /// An empty recipient.
    #[error("the address is empty; only a sender may be empty (the null sender)")]
    Empty,
    /// A control character (C0, DEL or C1).
    #[error("the address holds a control character at octet {at}")]
    Control {
        /// Where.
        at: usize,
    },
    /// No `@` after the local part.
    #[error("the address has no @ between a local part and a domain")]
    NoAt,
    /// The local part breaks RFC 5321's `Local-part`.
    #[error("the local part is not a dot-string or quoted string (octet {at})")]
    BadLocalPart {
        /// Where.
        at: usize,
    },
    /// The domain breaks RFC 5321's `Domain` and `address-literal`.
    #[error("the domain is not a host name or address literal (octet {at})")]
    BadDomain {
        /// Where.
        at: usize,
    },
}

/// Checks an envelope address as the relay sent it (without angle brackets).
pub fn check(address: &str, role: Role) -> Result<(), AddressError> {
    if address.is_empty() {
        return match role {
            Role::Sender => Ok(()),
            Role::Recipient => Err(AddressError::Empty),
        };
    }
    if address.len() > MAX_ADDRESS {
        return Err(AddressError::TooLong { len: address.len() });
    }
    if let Some((at, _)) = address.char_indices().find(|(_, c)| c.is_control()) {
        return Err(AddressError::Control { at });
    }
    if role == Role::Recipient && address.eq_ignore_ascii_case("postmaster") {
        return Ok(());
    }
    let at = local_part_end(address)?;
    let domain = address.get(at + 1..).unwrap_or_default();
    check_domain(domain, at + 1)
}

/// RFC 5322 `atext`, widened by RFC 6531 to every non-ASCII character.
fn is_atext(c: char) -> bool {
    c.is_ascii_alphanumeric() || "!#$%&'*+-/=?^_`{|}~".contains(c) || !c.is_ascii()
}

/// The offset of the `@` that ends the local part.
fn local_part_end(address: &str) -> Result<usize, AddressError> {
    let bad = |at: usize| Err(AddressError::BadLocalPart { at });
    let mut chars = address.char_indices().peekable();
    if address.starts_with('"') {
        chars.next();
        // Quoted-string: qtextSMTP (%d32-33 / %d35-91 / %d93-126, and non-ASCII) or a
        // quoted-pairSMTP (`\` then %d32-126).
        loop {
            match chars.next() {
                None => return bad(address.len()),
                Some((_, '"')) => break,
                Some((_, '\\')) => match chars.next() {
                    Some((_, c)) if (' '..='~').contains(&c) => {}
                    Some((i, _)) => return bad(i),
                    None => return bad(address.len()),
                },
                Some(_) => {}
            }
        }
        return match chars.next() {
            Some((i, '@')) => Ok(i),
            Some((i, _)) => bad(i),
            None => Err(AddressError::NoAt),
        };
    }
    // Dot-string: Atom *("." Atom).
    let mut atom_len = 0;
    for (i, c) in chars {
        match c {
            '@' if atom_len > 0 => return Ok(i),
            '.' if atom_len > 0 => atom_len = 0,
            c if is_atext(c) => atom_len += 1,
            _ => return bad(i),
        }
    }
    Err(AddressError::NoAt)
}

/// RFC 5321 `Domain` (labels; RFC 6531 U-labels as any non-ASCII letter) or
/// `address-literal`. `offset` places `domain` in the whole address for errors.
fn check_domain(domain: &str, offset: usize) -> Result<(), AddressError> {
    let bad = |at: usize| Err(AddressError::BadDomain { at: offset + at });
    if let Some(inner) = domain.strip_prefix('[') {
        let Some(literal) = inner.strip_suffix(']') else {
            return bad(domain.len());
        };
        return if address_literal(literal) {
            Ok(())
        } else {
            bad(1)
        };
    }
    // One trailing dot, as in a fully qualified name, is tolerated; the policy drops it.
    let name = domain.strip_suffix('.').unwrap_or(domain);
    if name.is_empty() {
        return bad(0);
    }
    let mut start = 0;
    for label in name.split('.') {
        let ok = !label.is_empty()
            && !label.starts_with('-')
            && !label.ends_with('-')
            && label
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-' || !c.is_ascii());
        if !ok {
            return bad(start);
        }
        start += label.len() + 1;
    }
    Ok(())
}

/// The inside of `[...]`: IPv4, `IPv6:` + IPv6, or RFC 5321's `General-address-literal`.
fn address_literal(literal: &str) -> bool {
    if literal.parse::<Ipv4Addr>().is_ok() {
        return true;
    }
    let Some((tag, content)) = literal.split_once(':') else {
        return false;
    };
    if tag.eq_ignore_ascii_case("IPv6") {
        return content.parse::<Ipv6Addr>().is_ok();
    }
    // Standardized-tag = Ldh-str; dcontent = %d33-90 / %d94-126.
    let tag_ok = tag
        .chars()
        .last()
        .is_some_and(|c| c.is_ascii_alphanumeric())
        && tag
            .chars()
            .next()
            .is_some_and(|c| c.is_ascii_alphanumeric())
        && tag.chars().all(|c| c.is_ascii_alphanumeric() || c == '-');
    let content_ok = !content.is_empty()
        && content
            .bytes()
            .all(|b| (33..=90).contains(&b) || (94..=126).contains(&b));
    tag_ok && content_ok
}

#[cfg(test)]
mod tests {
    use super::*;

    // Forms from RFC 5321 §4.1.2 and §4.1.3, RFC 6531 §3.3 and common practice.
    #[test]
    fn valid_addresses() {
        for a in [
            "user@example.org",
            "first.last+tag@mail.example.org",
            "!#$%&'*+-/=?^_`{|}~@example.org",
            "\"john doe\"@example.org",
            "\"a@b\\\"c\"@example.org",
            "\"\"@example.org",
            "user@example.org.",
            "user@localhost",
            "user@[192.0.2.1]",
            "user@[IPv6:2001:db8::1]",
            "user@[x-tag:opaque]",
            "josé@bücher.test",
            "用户@例子.测试",
            "a@xn--bcher-kva.test",
        ] {
            assert_eq!(check(a, Role::Recipient), Ok(()), "{a}");
            assert_eq!(check(a, Role::Sender), Ok(()), "{a}");
        }
        assert_eq!(check("", Role::Sender), Ok(()));
        assert_eq!(check("Postmaster", Role::Recipient), Ok(()));
    }

    #[test]
    fn invalid_addresses() {
        let cases: &[(&str, AddressError)] = &[
            ("", AddressError::Empty),
            ("user", AddressError::NoAt),
            ("user@", AddressError::BadDomain { at: 5 }),
            ("@example.org", AddressError::BadLocalPart { at: 0 }),
            (".user@example.org", AddressError::BadLocalPart { at: 0 }),
            ("us..er@example.org", AddressError::BadLocalPart { at: 3 }),
            ("user.@example.org", AddressError::BadLocalPart { at: 5 }),
            ("us er@example.org", AddressError::BadLocalPart { at: 2 }),
            ("a@b@example.org", AddressError::BadDomain { at: 2 }),
            ("user@exa mple.org", AddressError::BadDomain { at: 5 }),
            ("user@-example.org", AddressError::BadDomain { at: 5 }),
            ("user@example..org", AddressError::BadDomain { at: 13 }),
            ("user@under_score.test", AddressError::BadDomain { at: 5 }),
            ("user@[192.0.2.300]", AddressError::BadDomain { at: 6 }),
            ("user@[IPv6:zz::1]", AddressError::BadDomain { at: 6 }),
            ("user@[192.0.2.1", AddressError::BadDomain { at: 15 }),
            ("\"open@example.org", AddressError::BadLocalPart { at: 17 }),
            ("\"q\"x@example.org", AddressError::BadLocalPart { at: 3 }),
            ("user@example.org\n", AddressError::Control { at: 16 }),
            ("us\u{1b}er@example.org", AddressError::Control { at: 2 }),
            ("user@exam\u{85}ple.org", AddressError::Control { at: 9 }),
        ];
        for (address, error) in cases {
            assert_eq!(
                check(address, Role::Recipient).as_ref(),
                Err(error),
                "{address:?}"
            );
        }
        // The bare postmaster is a recipient form only.
        assert_eq!(check("postmaster", Role::Sender), Err(AddressError::NoAt));
    }

    #[test]
    fn the_limit_is_254_octets() {
        // RFC 5321 §4.5.3.1.3: a path is at most 256 octets, angle brackets included.
        let local = "a".repeat(64);
        let fits = format!("{local}@{}.test", "b".repeat(MAX_ADDRESS - 64 - 1 - 5));
        assert_eq!(fits.len(), MAX_ADDRESS);
        assert_eq!(check(&fits, Role::Recipient), Ok(()));
        let over = format!("{fits}x");
        assert_eq!(
            check(&over, Role::Recipient),
            Err(AddressError::TooLong { len: 255 })
        );
    }

    #[test]
    fn errors_never_quote_the_address() {
        let address = "secret-local\u{7}@example.org";
        let error = check(address, Role::Recipient).expect_err("control character");
        assert!(!error.to_string().contains("secret"), "{error}");
    }
}
