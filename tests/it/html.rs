//! HTML to text: character references against Python's `html.unescape`, structure of the
//! rendered text, and robustness on hostile markup.

use pretty_assertions::assert_eq;
use proptest::prelude::*;
use tamis::mail::html::{HtmlText, MAX_LINKS, decode_char_refs, html_to_text};

/// Applies Python's `html.unescape` to every string of a JSON array read from stdin.
const UNESCAPE_STDIN: &str = r#"
import html, json, sys
cases = json.load(sys.stdin)
json.dump([html.unescape(case) for case in cases], sys.stdout)
"#;

/// Builds cases from every name in `html.entities.html5` (the WHATWG table as Python ships
/// it): alone, inside text, and legacy names without `;` followed by more letters.
const NAMED_CASES: &str = r#"
import html, html.entities, json, sys
cases = []
for name in sorted(html.entities.html5):
    cases += ["&" + name, "a&" + name + "b", "&" + name + ";", "&" + name[:-1]]
    if not name.endswith(";"):
        cases += ["&" + name + "xyz;", "&" + name + "Q", "x&" + name + "9&" + name]
json.dump([[case, html.unescape(case)] for case in cases], sys.stdout)
"#;

fn python_unescape(cases: &[String]) -> Vec<String> {
    let input = serde_json::to_vec(cases).expect("encode cases");
    let output = crate::python::run(UNESCAPE_STDIN, &[], &input);
    serde_json::from_slice(&output).expect("Python printed a JSON array of strings")
}

/// Compares every case with Python and reports all mismatches at once.
fn assert_like_python(cases: &[String]) {
    let expected = python_unescape(cases);
    assert_eq!(expected.len(), cases.len());
    let mismatches: Vec<_> = cases
        .iter()
        .zip(&expected)
        .filter(|(case, want)| decode_char_refs(case) != want.as_str())
        .map(|(case, want)| format!("{case:?}: got {:?}, want {want:?}", decode_char_refs(case)))
        .take(20)
        .collect();
    assert!(mismatches.is_empty(), "{}", mismatches.join("\n"));
}

/// Deterministic xorshift, so the generated cases are the same on every run.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        self.0
    }

    fn below(&mut self, n: usize) -> usize {
        usize::try_from(self.next() % n as u64).unwrap_or(0)
    }

    fn pick<'a>(&mut self, items: &[&'a str]) -> &'a str {
        items[self.below(items.len())]
    }
}

#[test]
fn every_named_reference_decodes_like_python_unescape() {
    // Python html.unescape over html.entities.html5, the WHATWG HTML Living Standard's table
    // of named character references.
    let output = crate::python::run(NAMED_CASES, &[], b"");
    let pairs: Vec<(String, String)> =
        serde_json::from_slice(&output).expect("Python printed JSON pairs");
    assert!(pairs.len() > 4 * 2231, "the whole table was covered");
    let mismatches: Vec<_> = pairs
        .iter()
        .filter(|(case, want)| decode_char_refs(case) != want.as_str())
        .map(|(case, want)| format!("{case:?}: got {:?}, want {want:?}", decode_char_refs(case)))
        .take(20)
        .collect();
    assert!(mismatches.is_empty(), "{}", mismatches.join("\n"));
}

#[test]
fn numeric_references_decode_like_python_unescape() {
    let mut cases = Vec::new();
    let special = [
        0u32,
        1,
        8,
        9,
        10,
        11,
        12,
        13,
        14,
        31,
        32,
        65,
        127,
        128,
        159,
        160,
        0xFDCF,
        0xFDD0,
        0xFDEF,
        0xFDF0,
        0xD7FF,
        0xD800,
        0xDBFF,
        0xDC00,
        0xDFFF,
        0xE000,
        0xFFFD,
        0xFFFE,
        0xFFFF,
        0x1_0000,
        0x1_FFFE,
        0x1_FFFF,
        0x10_FFFD,
        0x10_FFFE,
        0x10_FFFF,
        0x11_0000,
        u32::MAX,
    ];
    for n in special.into_iter().chain(0x80..=0x9F) {
        cases.push(format!("&#{n};"));
        cases.push(format!("&#{n}x"));
        cases.push(format!("&#x{n:x};"));
        cases.push(format!("&#X{n:X}z"));
        cases.push(format!("&#000{n}"));
    }
    let mut rng = Rng(0x9E37_79B9_7F4A_7C15);
    for _ in 0..300 {
        let n = rng.next() >> rng.below(64);
        cases.push(format!("a&#{n};b"));
        cases.push(format!("&#x{n:x}&#{}", rng.below(0x11_0000)));
    }
    cases.extend(
        [
            "&#",
            "&#;",
            "&#x",
            "&#x;",
            "&#xg;",
            "&#0x41;",
            "&#-1;",
            "&# 65;",
            "&&#65;",
            "&#65&#66",
            "&#99999999999999999999999999;",
            "&#x110000000000000000000041;",
        ]
        .map(String::from),
    );
    // Python raises ValueError past 4300 decimal digits, so the long case stays below that.
    cases.push(format!("&#{};", "9".repeat(4000)));
    // Python html.unescape is the reference for every case.
    assert_like_python(&cases);
}

#[test]
fn generated_reference_soup_decodes_like_python_unescape() {
    // Python html.unescape: random mixes of the characters its pattern treats specially.
    let pieces = [
        "&",
        "#",
        ";",
        "x",
        "X",
        "amp",
        "lt",
        "not",
        "notin",
        "in",
        "copy",
        "AElig",
        "frac1",
        "2",
        "4",
        "0",
        "9",
        "a",
        "Z",
        " ",
        "\t",
        "\r",
        "\n",
        "<",
        "=",
        "é",
        "中",
        "😀",
        "&#",
        "&#x",
        "supseteq",
        "nGt",
        "ThickSpace",
        "\u{0}",
    ];
    let mut rng = Rng(0xD1B5_4A32_D192_ED03);
    let cases: Vec<String> = (0..3000)
        .map(|_| (0..rng.below(24)).map(|_| rng.pick(&pieces)).collect())
        .collect();
    // Python html.unescape is the reference for every case.
    assert_like_python(&cases);
}

#[test]
fn overlong_decimal_reference_is_replacement_character() {
    // Python raises ValueError here (its int() digit limit); a filter must not fail on it.
    let case = format!("a&#{};b", "1".repeat(10_000));
    assert_eq!(decode_char_refs(&case), "a\u{FFFD}b");
}

#[test]
fn text_without_references_is_borrowed() {
    assert!(matches!(
        decode_char_refs("plain text"),
        std::borrow::Cow::Borrowed(_)
    ));
}

fn render(html: &str) -> HtmlText {
    html_to_text(html, 1 << 20)
}

#[test]
fn scripts_styles_comments_and_declarations_are_dropped() {
    let html = "<!DOCTYPE html><html><head><title>Invoice</title>\
        <style>p { color: red } </p></style></head><body><!-- note --><?php x ?>\
        Hello<script type=text/javascript>if (a < b) { document.write('no') }</SCRIPT > there\
        <![CDATA[ gone ]]> friend</body></html>";
    assert_eq!(render(html).visible, "Hello there friend");
}

#[test]
fn block_elements_break_lines_and_cells_are_spaced() {
    let html = "<h1>Spring sale</h1><p>Dear   Odile,<br>your\n\n order\
        <ul><li>one</li><li>two</ul><table><tr><td>a</td><td>b</td></tr><tr><td>c</td></table>\
        <blockquote>quoted</blockquote>end";
    assert_eq!(
        render(html).visible,
        "Spring sale\nDear Odile,\nyour order\none\ntwo\na b\nc\nquoted\nend"
    );
}

#[test]
fn references_decode_in_text() {
    assert_eq!(
        render("caf&eacute; &amp; th&#233; &lt;b&gt; &notit; &nbsp;x &unknown;").visible,
        "café & thé <b> ¬it; \u{a0}x &unknown;"
    );
}

#[test]
fn inline_styles_and_hidden_attribute_go_to_hidden_text() {
    let html = "<div>Claim your <span style=\"display:none\">weather report</span>reward\
        <div hidden>lorem <b>ipsum</b></div>\
        <p style='FONT-SIZE: 0px'>tiny</p><font style=\"opacity:0\">ghost</font>\
        <td style=\"visibility : hidden !important\">cell</td> now</div>\
        <template>kept apart</template>";
    let text = render(html);
    // Hidden blocks make no line box, so "now" stays on the line of "reward".
    assert_eq!(text.visible, "Claim your reward now");
    assert_eq!(
        text.hidden,
        "weather report\nlorem ipsum\ntiny\nghost cell kept apart"
    );
}

#[test]
fn hidden_region_ends_with_its_own_element() {
    let text = render("<div style=display:none><div>a</div>b</div>c<div>d</div>");
    assert_eq!(text.visible, "c\nd");
    assert_eq!(text.hidden, "a\nb");
}

#[test]
fn links_are_collected_and_decoded() {
    let html = "<a href=\" https://shop.example.org/?a=1&amp;b=2&copy=3 \">x</a>\
        <img src='//cdn.example.org/p.png'><area HREF=mailto:someone@example.org>\
        <a href=\"http://ex&#10;ample.test/\">y</a><a href=''>z</a><link href=x.css>";
    // WHATWG HTML Living Standard, named character reference state: `&copy=` stays literal in
    // an attribute. WHATWG URL Standard, basic URL parser: C0 controls and spaces are trimmed,
    // tabs and newlines removed.
    assert_eq!(
        render(html).links,
        [
            "https://shop.example.org/?a=1&b=2&copy=3",
            "//cdn.example.org/p.png",
            "mailto:someone@example.org",
            "http://example.test/",
        ]
    );
}

#[test]
fn links_are_capped() {
    let html = "<a href=http://example.org/>x</a>".repeat(MAX_LINKS + 50);
    assert_eq!(render(&html).links.len(), MAX_LINKS);
}

#[test]
fn attribute_syntax_variants() {
    let html = "<A HREF='one' href=two>a</A><a title=\"x > y\" href=three>b</a>\
        <a/href=four>c</a><a =x href = five >d</a>";
    let text = render(html);
    assert_eq!(text.links, ["one", "three", "four", "five"]);
    assert_eq!(text.visible, "abcd");
}

#[test]
fn stray_angle_brackets_are_text() {
    assert_eq!(
        render("1 < 2 and 3 <= 4 <3 <").visible,
        "1 < 2 and 3 <= 4 <3 <"
    );
    assert_eq!(render("x </").visible, "x </");
    // WHATWG HTML Living Standard, end tag open state: `</` and a non-letter open a bogus
    // comment, which runs to the next `>`.
    assert_eq!(render("x</ 1>y</ never closed").visible, "xy");
    assert_eq!(render("a</>b</ 1>c").visible, "abc");
}

#[test]
fn textarea_is_text_and_xmp_is_literal() {
    assert_eq!(
        render("<textarea>x &amp; <b>y</b></textarea><xmp>&amp; <i></xmp>").visible,
        "x & <b>y</b>\n&amp; <i>"
    );
    assert_eq!(
        render("a<plaintext></plaintext>&lt;").visible,
        "a\n</plaintext>&lt;"
    );
}

#[test]
fn unterminated_markup_swallows_the_rest() {
    // WHATWG HTML Living Standard, tokenization: end of file inside a tag, comment or raw text
    // element emits nothing more; `<!-->`, `<!--->` and `--!>` close a comment.
    assert_eq!(render("keep<!-- never closed <b>bold</b>").visible, "keep");
    assert_eq!(render("keep<a href=\"x>y</a> more").visible, "keep");
    assert_eq!(render("keep<div").visible, "keep");
    assert_eq!(render("keep<script>alert(1)").visible, "keep");
    assert_eq!(render("keep<!doctype").visible, "keep");
    assert_eq!(render("a<!-->b<!--->c<!-- x --!>d").visible, "abcd");
}

#[test]
fn million_nested_divs_stay_bounded() {
    let mut html = "<div style=display:none>".repeat(1_000_000);
    html.push_str("deep");
    html.push_str(&"</div>".repeat(1_000_000));
    html.push_str("out");
    let text = render(&html);
    assert_eq!(text.hidden, "deep");
    assert_eq!(text.visible, "out");
}

#[test]
fn million_unclosed_tags_stay_bounded() {
    let html = "<span hidden><b>x".repeat(1_000_000);
    let text = html_to_text(&html, 4096);
    assert!(text.truncated);
    assert!(text.visible.is_empty());
    assert_eq!(text.hidden.len(), 4096);
}

#[test]
fn ten_megabytes_of_angle_brackets() {
    let html = "<".repeat(10 << 20);
    let text = html_to_text(&html, 1000);
    assert!(text.truncated);
    assert_eq!(text.visible.len(), 1000);
}

#[test]
fn fifty_megabytes_of_text_stop_at_the_cap() {
    let html = "lorem ipsum dolor &amp; sit amet ".repeat(50 << 20 >> 5);
    let text = html_to_text(&html, 64 << 10);
    assert!(text.truncated);
    assert_eq!(text.visible.len(), 64 << 10);
}

#[test]
fn megabyte_attribute_values() {
    let value = "v".repeat(1 << 20);
    let html = format!("<a title=\"{value}\" href='{value}' x={value}>text</a>");
    let text = render(&html);
    assert_eq!(text.visible, "text");
    assert_eq!(text.links.len(), 1);
    assert_eq!(text.links[0].len(), tamis::mail::html::MAX_LINK_BYTES);
}

#[test]
fn truncation_is_a_prefix_of_the_full_output() {
    let html = "<p>alpha beta</p><div hidden>gamma</div>delta épsilon";
    let full = render(html);
    for cap in 0..40 {
        let cut = html_to_text(html, cap);
        assert!(cut.visible.len() + cut.hidden.len() <= cap);
        assert!(full.visible.starts_with(&cut.visible), "cap {cap}");
        assert!(full.hidden.starts_with(&cut.hidden), "cap {cap}");
        assert_eq!(
            cut.truncated,
            full.visible.len() + full.hidden.len() > cap,
            "cap {cap}"
        );
    }
}

proptest! {
    #[test]
    fn arbitrary_input_never_panics_and_respects_the_cap(
        input in "(<|>|&|#|;|/|!|-|=|\"|'|[a-z]{1,6}| |\n|x|[0-9]{1,3}|é|\u{0})*",
        cap in 0usize..200,
    ) {
        let text = html_to_text(&input, cap);
        prop_assert!(text.visible.len() + text.hidden.len() <= cap);
        prop_assert!(text.links.len() <= MAX_LINKS);
        let _ = decode_char_refs(&input);
    }

    #[test]
    fn arbitrary_unicode_never_panics(input in "\\PC*", cap in 0usize..1000) {
        let text = html_to_text(&input, cap);
        prop_assert!(text.visible.len() + text.hidden.len() <= cap);
    }
}
