//! The language-neutral shape of a message's content and its rendering to plain text and HTML.
//!
//! Templates describe a message as a list of [`Block`]s; this module turns those blocks into
//! the two renderings mail software commonly sends side by side, so the plain and HTML
//! alternatives of one message say the same thing, as they do in real mail.

/// The language a message is written in; it decides the candidate charsets.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Lang {
    /// English.
    En,
    /// German.
    De,
    /// French.
    Fr,
    /// Russian.
    Ru,
    /// Japanese.
    Ja,
}

/// One unit of message content.
#[derive(Debug, Clone)]
pub(crate) enum Block {
    /// A section title.
    Heading(String),
    /// A paragraph of running text.
    Para(String),
    /// A labelled link.
    Link { text: String, url: String },
    /// A prominent call-to-action link (a button in HTML).
    Button { text: String, url: String },
    /// A bulleted list.
    Bullets(Vec<String>),
    /// Two-column rows, e.g. invoice lines.
    Table(Vec<(String, String)>),
    /// Quoted earlier text in a reply.
    Quote(String),
    /// Small print: footers, legal lines.
    Small(String),
    /// A remote or inline image.
    Image {
        alt: String,
        src: String,
        href: Option<String>,
    },
    /// Text present in the HTML but hidden from the reader (junk senders' padding).
    Hidden(String),
    /// Lines kept exactly as written (signatures, codes).
    Verbatim(String),
}

/// How the content is laid out in MIME.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Layout {
    /// text/plain only.
    Plain,
    /// multipart/alternative with plain and HTML.
    Alternative,
    /// text/html only.
    HtmlOnly,
    /// multipart/related: HTML whose content is an inline image and a link.
    ImageOnly,
    /// multipart/digest of embedded messages.
    Digest,
}

/// A file attached to a message.
#[derive(Debug, Clone)]
pub(crate) enum Attachment {
    /// A PDF showing these lines.
    Pdf {
        filename: String,
        lines: Vec<String>,
    },
    /// A PNG picture.
    Png { filename: String },
    /// A ZIP holding one file of the given name.
    Zip { filename: String, inner: String },
    /// A plain-text file.
    Text { filename: String, text: String },
}

/// One message of a digest.
#[derive(Debug, Clone)]
pub(crate) struct DigestItem {
    /// Author as `Name <addr>`.
    pub from: String,
    /// Subject of the list post.
    pub subject: String,
    /// Body text.
    pub text: String,
}

/// Mailing-list fields (RFC 2369, RFC 2919).
#[derive(Debug, Clone)]
pub(crate) struct ListInfo {
    /// The `List-Id` value.
    pub id: String,
    /// The unsubscribe URL.
    pub unsubscribe: String,
}

/// Everything a template decides about one message; the MIME layer decides the rest.
#[derive(Debug, Clone)]
pub(crate) struct Draft {
    /// Decoded subject.
    pub subject: String,
    /// Sender display name (may be empty).
    pub from_name: String,
    /// Sender address.
    pub from_addr: String,
    /// A `Reply-To` address, when it differs from the sender.
    pub reply_to: Option<String>,
    /// Language of the text.
    pub lang: Lang,
    /// The content.
    pub blocks: Vec<Block>,
    /// MIME shape.
    pub layout: Layout,
    /// Files attached.
    pub attachments: Vec<Attachment>,
    /// Mailing-list fields.
    pub list: Option<ListInfo>,
    /// Whether bulk-mail headers apply.
    pub bulk: bool,
    /// The sending relay: (HELO name, reverse DNS name or empty, IP address).
    pub relay: (String, String, String),
    /// HTML accent colour.
    pub accent: &'static str,
    /// Digest parts when the layout is [`Layout::Digest`].
    pub digest: Vec<DigestItem>,
    /// The message this one answers.
    pub in_reply_to: Option<String>,
    /// Text that only UTF-8 can carry (look-alikes, zero-width characters).
    pub needs_utf8: bool,
}

impl Draft {
    /// A draft with the given sender and subject and everything else empty.
    pub(crate) fn new(lang: Lang, from_name: &str, from_addr: &str, subject: String) -> Self {
        Draft {
            subject,
            from_name: from_name.to_string(),
            from_addr: from_addr.to_string(),
            reply_to: None,
            lang,
            blocks: Vec::new(),
            layout: Layout::Plain,
            attachments: Vec::new(),
            list: None,
            bulk: false,
            relay: (String::new(), String::new(), String::new()),
            accent: "#1f5f8b",
            digest: Vec::new(),
            in_reply_to: None,
            needs_utf8: false,
        }
    }

    /// Sets the sending relay to a named host.
    pub(crate) fn via(mut self, host: &str, ip: &str) -> Self {
        self.relay = (host.to_string(), host.to_string(), ip.to_string());
        self
    }

    /// The domain part of the sender address.
    pub(crate) fn sender_domain(&self) -> &str {
        self.from_addr.rsplit('@').next().unwrap_or("")
    }
}

/// Plain-text rendering: paragraphs wrapped at 72 columns, links written out.
pub(crate) fn render_plain(blocks: &[Block], lang: Lang) -> String {
    let mut out = String::new();
    for block in blocks {
        match block {
            Block::Heading(t) => {
                out.push_str(t);
                out.push('\n');
                let width = t.chars().count().min(72);
                out.push_str(&"=".repeat(width));
                out.push_str("\n\n");
            }
            Block::Para(t) | Block::Small(t) => {
                out.push_str(&wrap(t, 72, lang, ""));
                out.push_str("\n\n");
            }
            Block::Link { text, url } => {
                out.push_str(&format!("{text}:\n{url}\n\n"));
            }
            Block::Button { text, url } => {
                out.push_str(&format!("{text}: {url}\n\n"));
            }
            Block::Bullets(items) => {
                for item in items {
                    out.push_str(&wrap(item, 70, lang, "  * "));
                    out.push('\n');
                }
                out.push('\n');
            }
            Block::Table(rows) => {
                let width = rows
                    .iter()
                    .map(|(k, _)| k.chars().count())
                    .max()
                    .unwrap_or(0)
                    .min(48);
                for (k, v) in rows {
                    let pad = width.saturating_sub(k.chars().count());
                    out.push_str(&format!("{k}{}  {v}\n", " ".repeat(pad)));
                }
                out.push('\n');
            }
            Block::Quote(t) => {
                for line in wrap(t, 70, lang, "").lines() {
                    out.push_str("> ");
                    out.push_str(line);
                    out.push('\n');
                }
                out.push('\n');
            }
            Block::Image { alt, .. } => {
                if !alt.is_empty() {
                    out.push_str(&format!("[{alt}]\n\n"));
                }
            }
            Block::Hidden(_) => {}
            Block::Verbatim(t) => {
                out.push_str(t);
                out.push_str("\n\n");
            }
        }
    }
    let trimmed = out.trim_end().len();
    out.truncate(trimmed);
    out.push('\n');
    out
}

/// HTML rendering in the table-and-inline-style manner of bulk senders' templates.
pub(crate) fn render_html(blocks: &[Block], title: &str, accent: &str) -> String {
    let mut out = String::new();
    out.push_str("<!DOCTYPE html>\n<html>\n<head>\n<meta http-equiv=\"Content-Type\" ");
    out.push_str("content=\"text/html; charset=utf-8\">\n");
    out.push_str(&format!("<title>{}</title>\n", escape(title)));
    out.push_str("<style type=\"text/css\">\nbody { margin: 0; padding: 0; }\n");
    out.push_str("td { font-family: Helvetica, Arial, sans-serif; font-size: 14px; }\n");
    out.push_str("a { color: ");
    out.push_str(accent);
    out.push_str("; }\n</style>\n</head>\n<body style=\"background-color:#f4f4f1;\">\n");
    out.push_str("<table width=\"100%\" cellpadding=\"0\" cellspacing=\"0\" border=\"0\">\n");
    out.push_str("<tr><td align=\"center\">\n<table width=\"600\" cellpadding=\"12\" ");
    out.push_str("cellspacing=\"0\" border=\"0\" style=\"background:#ffffff;\">\n");
    for block in blocks {
        out.push_str("<tr><td>\n");
        match block {
            Block::Heading(t) => {
                out.push_str(&format!(
                    "<h2 style=\"margin:0;color:{accent};font-size:20px;\">{}</h2>\n",
                    escape(t)
                ));
            }
            Block::Para(t) => {
                out.push_str(&format!(
                    "<p style=\"margin:0 0 10px 0;line-height:1.5;\">{}</p>\n",
                    escape(t)
                ));
            }
            Block::Link { text, url } => {
                out.push_str(&format!(
                    "<p><a href=\"{}\" target=\"_blank\">{}</a></p>\n",
                    escape(url),
                    escape(text)
                ));
            }
            Block::Button { text, url } => {
                out.push_str(&format!(
                    "<table cellpadding=\"0\" cellspacing=\"0\"><tr><td \
                     style=\"background:{accent};border-radius:4px;padding:10px 18px;\">\n\
                     <a href=\"{}\" style=\"color:#ffffff;text-decoration:none;\
                     font-weight:bold;\">{}</a>\n</td></tr></table>\n",
                    escape(url),
                    escape(text)
                ));
            }
            Block::Bullets(items) => {
                out.push_str("<ul>\n");
                for item in items {
                    out.push_str(&format!("<li>{}</li>\n", escape(item)));
                }
                out.push_str("</ul>\n");
            }
            Block::Table(rows) => {
                out.push_str("<table width=\"100%\" cellpadding=\"4\" cellspacing=\"0\" ");
                out.push_str("style=\"border-collapse:collapse;\">\n");
                for (k, v) in rows {
                    out.push_str(&format!(
                        "<tr><td style=\"border-bottom:1px solid #dddddd;\">{}</td>\
                         <td align=\"right\" style=\"border-bottom:1px solid #dddddd;\">{}</td></tr>\n",
                        escape(k),
                        escape(v)
                    ));
                }
                out.push_str("</table>\n");
            }
            Block::Quote(t) => {
                out.push_str(&format!(
                    "<blockquote style=\"border-left:2px solid #cccccc;margin:0;padding-left:8px;\
                     color:#555555;\">{}</blockquote>\n",
                    escape(t)
                ));
            }
            Block::Small(t) => {
                out.push_str(&format!(
                    "<p style=\"font-size:11px;color:#888888;\">{}</p>\n",
                    escape(t)
                ));
            }
            Block::Image { alt, src, href } => {
                let img = format!(
                    "<img src=\"{}\" alt=\"{}\" width=\"560\" style=\"display:block;border:0;\">",
                    escape(src),
                    escape(alt)
                );
                match href {
                    Some(h) => out.push_str(&format!("<a href=\"{}\">{img}</a>\n", escape(h))),
                    None => {
                        out.push_str(&img);
                        out.push('\n');
                    }
                }
            }
            Block::Hidden(t) => {
                out.push_str(&format!(
                    "<div style=\"display:none;font-size:0;max-height:0;overflow:hidden;\">{}</div>\n",
                    escape(t)
                ));
            }
            Block::Verbatim(t) => {
                out.push_str(&format!(
                    "<pre style=\"font-family:monospace;\">{}</pre>\n",
                    escape(t)
                ));
            }
        }
        out.push_str("</td></tr>\n");
    }
    out.push_str("</table>\n</td></tr>\n</table>\n</body>\n</html>\n");
    out
}

/// Escapes the five characters HTML text and attribute values must not carry raw.
pub(crate) fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// Word-wraps `text` at `width` columns, prefixing the first line with `lead` and indenting
/// the rest to match. Japanese has no spaces between words, so it is cut every 36 characters
/// (two columns each), which is where mail clients commonly break it.
pub(crate) fn wrap(text: &str, width: usize, lang: Lang, lead: &str) -> String {
    let indent = " ".repeat(lead.chars().count());
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::from(lead);
    let mut cols = lead.chars().count();
    if lang == Lang::Ja {
        for c in text.chars() {
            let w = if c.is_ascii() { 1 } else { 2 };
            if cols + w > width {
                lines.push(std::mem::replace(&mut line, indent.clone()));
                cols = indent.len();
            }
            line.push(c);
            cols += w;
        }
    } else {
        let mut fresh = true;
        for word in text.split_whitespace() {
            let w = word.chars().count();
            if !fresh && cols + 1 + w > width {
                lines.push(std::mem::replace(&mut line, indent.clone()));
                cols = indent.len();
                fresh = true;
            }
            if !fresh {
                line.push(' ');
                cols += 1;
            }
            line.push_str(word);
            cols += w;
            fresh = false;
        }
    }
    lines.push(line);
    lines.join("\n")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wrap_keeps_lines_short() {
        let text = "word ".repeat(100);
        for line in wrap(&text, 72, Lang::En, "").lines() {
            assert!(line.chars().count() <= 72);
        }
        let ja = "会議".repeat(100);
        for line in wrap(&ja, 72, Lang::Ja, "").lines() {
            assert!(line.chars().count() <= 36);
        }
    }

    #[test]
    fn wrap_bullet_lead() {
        let w = wrap("alpha beta", 70, Lang::En, "  * ");
        assert_eq!(w, "  * alpha beta");
    }

    #[test]
    fn html_escapes_text() {
        let html = render_html(&[Block::Para("a < b & c".into())], "t", "#123456");
        assert!(html.contains("a &lt; b &amp; c"));
    }
}
