//! URLs: found in text and in HTML links, reduced to their hosts.
//!
//! A URL in body text is cut out of the text (a reader does not read URLs as words) and its
//! host goes to the URL namespace instead, so the same message sent as plain text or as HTML
//! with the URL hidden behind a link yields the same words.

/// At most this many hosts are kept per message; junk mail with ten thousand links must
/// not cost ten thousand allocations.
pub const MAX_HOSTS: usize = 256;

/// The lower-cased host of `url` (`scheme://user@host:port/...` or `www.host/...`), or
/// `None` when it has no plausible host.
pub fn host_of(url: &str) -> Option<String> {
    let url = url.trim();
    let rest = match url.find("://") {
        Some(p) => {
            let scheme = &url[..p];
            let scheme_ok = !scheme.is_empty()
                && scheme
                    .chars()
                    .all(|c| c.is_ascii_alphanumeric() || matches!(c, '+' | '-' | '.'));
            if !scheme_ok {
                return None;
            }
            &url[p + 3..]
        }
        None if starts_with_ignore_case(url, "www.") => url,
        None => return None,
    };
    let authority = rest.split(['/', '?', '#', '\\']).next().unwrap_or(rest);
    let host_port = authority.rsplit('@').next().unwrap_or(authority);
    let host = if let Some(inner) = host_port.strip_prefix('[') {
        // An IPv6 literal (RFC 3986 §3.2.2).
        inner.split(']').next().unwrap_or(inner)
    } else {
        host_port.split(':').next().unwrap_or(host_port)
    };
    let host = host.trim_end_matches('.');
    let valid = !host.is_empty()
        && host.len() <= 253
        && host
            .chars()
            .all(|c| c.is_alphanumeric() || matches!(c, '.' | '-' | '_' | ':'));
    valid.then(|| host.to_lowercase())
}

fn starts_with_ignore_case(s: &str, prefix: &str) -> bool {
    s.len() >= prefix.len() && s.as_bytes()[..prefix.len()].eq_ignore_ascii_case(prefix.as_bytes())
}

/// Byte range of the URL that starts at `start` in `text`: it runs to the first
/// whitespace, quote or angle bracket, minus trailing sentence punctuation.
fn url_end(text: &str, start: usize) -> usize {
    let tail = &text[start..];
    let len = tail
        .find(|c: char| c.is_whitespace() || matches!(c, '"' | '\'' | '<' | '>' | '`'))
        .unwrap_or(tail.len());
    let trimmed = tail[..len].trim_end_matches(['.', ',', ';', ':', '!', '?', ')', ']']);
    start + trimmed.len()
}

/// Start of the next URL in `text` at or after `from`: `http://`, `https://` or a bare
/// `www.` at a word start (case-insensitive).
fn next_url_start(text: &str, from: usize) -> Option<usize> {
    let bytes = text.as_bytes();
    let mut i = from;
    while i < bytes.len() {
        let p = i + bytes[i..]
            .iter()
            .position(|b| matches!(b, b'h' | b'H' | b'w' | b'W'))?;
        let rest = &text[p..];
        let at_word_start = p == 0 || !bytes[p - 1].is_ascii_alphanumeric();
        if at_word_start
            && (starts_with_ignore_case(rest, "http://")
                || starts_with_ignore_case(rest, "https://")
                || starts_with_ignore_case(rest, "www."))
        {
            return Some(p);
        }
        i = p + 1;
    }
    None
}

/// Appends `text` to `out` with every URL replaced by a space, and pushes the URLs' hosts
/// to `hosts` (up to [`MAX_HOSTS`]). Returns how many URLs were found.
pub fn cut_urls(text: &str, out: &mut String, hosts: &mut Vec<String>) -> usize {
    let mut found = 0;
    let mut copied = 0;
    let mut search = 0;
    while let Some(start) = next_url_start(text, search) {
        let end = url_end(text, start);
        if end <= start {
            search = start + 1;
            continue;
        }
        found += 1;
        if hosts.len() < MAX_HOSTS
            && let Some(host) = host_of(&text[start..end])
        {
            hosts.push(host);
        }
        out.push_str(&text[copied..start]);
        out.push(' ');
        copied = end;
        search = end;
    }
    out.push_str(&text[copied..]);
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hosts_from_urls() {
        // RFC 3986 §3.2: userinfo and port are not part of the host.
        assert_eq!(
            host_of("https://user:pw@Promo.Example:8443/x?y").as_deref(),
            Some("promo.example")
        );
        assert_eq!(
            host_of("http://[2001:db8::1]/").as_deref(),
            Some("2001:db8::1")
        );
        assert_eq!(
            host_of("www.lindqvist.test/path").as_deref(),
            Some("www.lindqvist.test")
        );
        assert_eq!(host_of("mailto:ada@example.org"), None);
        assert_eq!(host_of("http://"), None);
    }

    #[test]
    fn cuts_urls_out_of_text() {
        let mut out = String::new();
        let mut hosts = Vec::new();
        let n = cut_urls(
            "Visit https://deals.example/now, or WWW.Other.Example. Thanks",
            &mut out,
            &mut hosts,
        );
        assert_eq!(n, 2);
        assert_eq!(out, "Visit  , or  . Thanks");
        assert_eq!(hosts, vec!["deals.example", "www.other.example"]);
    }

    #[test]
    fn words_containing_www_or_http_are_not_urls() {
        let mut out = String::new();
        let mut hosts = Vec::new();
        assert_eq!(cut_urls("awww.x shttp://y", &mut out, &mut hosts), 0);
    }
}
