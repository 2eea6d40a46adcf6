//! TEMPORARY shim until the real module lands (helper replaces this file).
pub struct HtmlText { pub visible: String, pub hidden: String, pub links: Vec<String>, pub truncated: bool }
pub fn html_to_text(html: &str, _max: usize) -> HtmlText {
    let mut visible = String::new(); let mut in_tag = false;
    for c in html.chars() { match c { '<' => { in_tag = true; visible.push(' ') } '>' => in_tag = false, c if !in_tag => visible.push(c), _ => {} } }
    HtmlText { visible, hidden: String::new(), links: Vec::new(), truncated: false }
}
