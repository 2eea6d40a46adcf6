//! The domain of the first address in an address field (RFC 5322 §3.4), in linear time.
//!
//! Only the first mailbox matters to the filter, so this is a scan rather than a full
//! parser: comments (nested, RFC 5322 §3.2.2) and quoted strings are skipped, inside an
//! angle-bracketed address too (a quoted local part holds no domain), an angle-bracketed
//! address wins over the display name before it, a group's display name
//! (`name:`) is passed over, and the first mailbox holding an `@` gives the domain. Encoded
//! words (RFC 2047) are recognised with the same tokenizer as unstructured fields and read
//! as opaque display-name material: RFC 2047 §5 forbids them inside an address, so what
//! they decode to can never move the address. At most
//! [`MAX_FIELD_BYTES`](super::encoded_words::MAX_FIELD_BYTES) of the field are read.

use super::encoded_words::{Token, field_text, tokenize};

/// Domain of the first address of an address field's raw value, lower-cased, without a
/// trailing dot; `None` when no mailbox with an `@` comes before the end of what is read,
/// or the first one has an empty domain.
pub fn first_domain(raw: &[u8]) -> Option<String> {
    first_domain_counted(raw).0
}

/// [`first_domain`], also returning the bytes the tokenizer examined (for linear-time
/// tests).
pub fn first_domain_counted(raw: &[u8]) -> (Option<String>, usize) {
    let text = field_text(raw);
    let mut scan = Scan::default();
    let work = tokenize(&text, |token| {
        if scan.found.is_some() {
            return;
        }
        match token {
            Token::Text(text) | Token::Space(text) => text.chars().for_each(|c| scan.step(c)),
            Token::LineBreak => scan.step(' '),
            // Display-name material: opaque, whatever it decodes to.
            Token::Word(_) => scan.step('x'),
        }
    });
    let found = match scan.found {
        Some(found) => found,
        None => scan.finish(),
    };
    (found, work)
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
enum State {
    /// Between tokens of a mailbox or a display name.
    #[default]
    Normal,
    /// Inside a quoted string.
    Quoted,
    /// After a backslash in a quoted string.
    QuotedEscape,
    /// Inside a comment, nested this deep.
    Comment(usize),
    /// After a backslash in a comment nested this deep.
    CommentEscape(usize),
}

#[derive(Default)]
struct Scan {
    state: State,
    /// The current mailbox outside quoted strings and comments.
    mailbox: String,
    /// Inside `<...>`: the address read so far.
    angle: Option<String>,
    /// `Some` once the first mailbox with an `@` was read (its domain, if not empty).
    found: Option<Option<String>>,
}

impl Scan {
    fn step(&mut self, c: char) {
        if self.found.is_some() {
            return;
        }
        self.state = match self.state {
            State::Normal if self.angle.is_some() => match c {
                '"' => State::Quoted,
                '(' => State::Comment(1),
                '>' => {
                    let address = self.angle.take().unwrap_or_default();
                    if address.contains('@') {
                        self.found = Some(domain_of(&address));
                    }
                    self.mailbox.clear();
                    State::Normal
                }
                c => {
                    if let Some(address) = self.angle.as_mut() {
                        address.push(c);
                    }
                    State::Normal
                }
            },
            State::Normal => match c {
                '"' => State::Quoted,
                '(' => State::Comment(1),
                '<' => {
                    self.angle = Some(String::new());
                    State::Normal
                }
                ',' | ';' => {
                    self.end_mailbox();
                    State::Normal
                }
                // A group's display name ends at its colon (RFC 5322 §3.4); a colon after
                // an `@` is part of a (malformed) address instead.
                ':' if !self.mailbox.contains('@') => {
                    self.mailbox.clear();
                    State::Normal
                }
                c => {
                    self.mailbox.push(c);
                    State::Normal
                }
            },
            State::Quoted => match c {
                '\\' => State::QuotedEscape,
                '"' => State::Normal,
                _ => State::Quoted,
            },
            State::QuotedEscape => State::Quoted,
            State::Comment(depth) => match c {
                '\\' => State::CommentEscape(depth),
                '(' => State::Comment(depth + 1),
                ')' if depth <= 1 => State::Normal,
                ')' => State::Comment(depth - 1),
                _ => State::Comment(depth),
            },
            State::CommentEscape(depth) => State::Comment(depth),
        };
    }

    /// A mailbox without angle brackets ended (at `,`, `;` or the end of the field).
    fn end_mailbox(&mut self) {
        if self.found.is_none() && self.mailbox.contains('@') {
            self.found = Some(domain_of(&self.mailbox));
        }
        self.mailbox.clear();
    }

    fn finish(mut self) -> Option<String> {
        if self.state == State::Normal && self.angle.is_none() {
            self.end_mailbox();
        }
        self.found.flatten()
    }
}

fn domain_of(address: &str) -> Option<String> {
    let domain = address.rsplit_once('@')?.1.trim().trim_end_matches('.');
    if domain.is_empty() {
        None
    } else {
        Some(domain.to_ascii_lowercase())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn domain(value: &str) -> Option<String> {
        first_domain(value.as_bytes())
    }

    #[test]
    fn the_forms_of_rfc_5322() {
        // RFC 5322 §3.4 forms and the appendix A.1.2 / A.1.3 examples.
        assert_eq!(domain("john@Example.ORG").as_deref(), Some("example.org"));
        assert_eq!(
            domain("\"Joe Q. Public\" <john.q.public@example.com>").as_deref(),
            Some("example.com")
        );
        assert_eq!(
            domain("Pete(A nice \\) chap) <pete(his account)@silly.test(his host)>").as_deref(),
            Some("silly.test")
        );
        assert_eq!(
            domain("A Group:Ed Jones <c@a.test>,joe@where.test,John <jdoe@one.test>;").as_deref(),
            Some("a.test")
        );
        assert_eq!(
            domain("Undisclosed recipients:;, next@example.net").as_deref(),
            Some("example.net")
        );
        assert_eq!(
            domain("ada@example.org (Ada (the (first)) one)").as_deref(),
            Some("example.org")
        );
        assert_eq!(
            domain("\"a@evil.test\"@example.org").as_deref(),
            Some("example.org")
        );
        assert_eq!(
            domain("Joe <\"joe@x.test\"@example.org>").as_deref(),
            Some("example.org")
        );
        assert_eq!(
            domain("=?utf-8?q?x_<a@evil.test>?= <b@good.test>").as_deref(),
            Some("good.test"),
            "an encoded word cannot forge the address"
        );
        assert_eq!(domain("no address here"), None);
        assert_eq!(domain("a@"), None);
        assert_eq!(domain(""), None);
    }
}
