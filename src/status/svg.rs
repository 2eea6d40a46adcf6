//! The page's charts as inline SVG: verdict volume over time, the margins of reported
//! mail against the thresholds, and a false-positive interval against its target.
//!
//! Invariants: charts hold only numbers and our own labels (no text from a message or a
//! peer), written through [`Html`] all the same; colours come from the page's style sheet
//! by class, so no inline style is needed (the page's Content-Security-Policy allows none);
//! every chart has a `<title>` and its figures are also in the page as text, so it reads
//! without the picture.

use super::html::{Html, count, utc};
use super::page::Section;
use crate::policy::Scale;
use crate::store::figures::{Rate, TargetCheck};
use crate::store::{MarginHistogram, VolumeBucket};

/// A round number at or above `v` (1, 2 or 5 times a power of ten), at least 1.
fn nice_ceiling(v: u64) -> u64 {
    let mut step = 1u64;
    loop {
        for m in [1u64, 2, 5] {
            let n = step.saturating_mul(m);
            if n >= v || n == u64::MAX {
                return n.max(1);
            }
        }
        step = step.saturating_mul(10);
    }
}

/// Writes `f` with at most one decimal, as SVG coordinates are written.
fn n(h: &mut Html, f: f64) {
    if f.is_finite() {
        h.show(format_args!("{:.1}", f));
    } else {
        h.raw("0");
    }
}

fn rect(h: &mut Html, class: &'static str, x: f64, y: f64, w: f64, height: f64) {
    if height <= 0.0 || w <= 0.0 {
        return;
    }
    h.raw("<rect class=\"").raw(class).raw("\" x=\"");
    n(h, x);
    h.raw("\" y=\"");
    n(h, y);
    h.raw("\" width=\"");
    n(h, w);
    h.raw("\" height=\"");
    n(h, height);
    h.raw("\"/>");
}

fn line(h: &mut Html, class: &'static str, x1: f64, y1: f64, x2: f64, y2: f64) {
    h.raw("<line class=\"").raw(class).raw("\" x1=\"");
    n(h, x1);
    h.raw("\" y1=\"");
    n(h, y1);
    h.raw("\" x2=\"");
    n(h, x2);
    h.raw("\" y2=\"");
    n(h, y2);
    h.raw("\"/>");
}

fn label(h: &mut Html, class: &'static str, x: f64, y: f64, text: &str) {
    h.raw("<text class=\"").raw(class).raw("\" x=\"");
    n(h, x);
    h.raw("\" y=\"");
    n(h, y);
    h.raw("\">").text(text).raw("</text>");
}

const VW: f64 = 1000.0;
const VH: f64 = 172.0;
const LEFT: f64 = 46.0;
const RIGHT: f64 = 8.0;
const TOP: f64 = 10.0;
const BOTTOM: f64 = 24.0;

/// Stacked bars of verdicts per bucket: accept, tag (the part tag-only kept from
/// quarantine hatched), quarantine, defer.
pub fn volume(buckets: &[VolumeBucket], width: i64, title: &str) -> Html {
    let mut h = Html::new();
    let total: u64 = buckets.iter().map(|b| b.by_action.total()).sum();
    let top = nice_ceiling(
        buckets
            .iter()
            .map(|b| b.by_action.total())
            .max()
            .unwrap_or(0),
    );
    h.raw("<svg class=\"chart\" viewBox=\"0 0 1000 172\" width=\"1000\" height=\"172\" role=\"img\" aria-label=\"")
        .attr(title)
        .raw("\"><title>")
        .text(title)
        .raw("</title>");
    h.raw("<defs><pattern id=\"hatch\" width=\"5\" height=\"5\" patternUnits=\"userSpaceOnUse\" patternTransform=\"rotate(45)\"><rect class=\"t\" width=\"5\" height=\"5\"/><line class=\"hl\" x1=\"0\" y1=\"0\" x2=\"0\" y2=\"5\"/></pattern></defs>");
    let plot_w = VW - LEFT - RIGHT;
    let plot_h = VH - TOP - BOTTOM;
    let scale = plot_h / top as f64;
    for (i, tick) in [0, top / 2, top].into_iter().enumerate() {
        let y = TOP + plot_h - tick as f64 * scale;
        line(
            &mut h,
            if i == 0 { "ax" } else { "grid" },
            LEFT,
            y,
            VW - RIGHT,
            y,
        );
        label(&mut h, "yl", LEFT - 5.0, y + 3.5, &count(tick));
    }
    let slot = plot_w / buckets.len().max(1) as f64;
    let bar = (slot * 0.78).max(1.0);
    for (i, b) in buckets.iter().enumerate() {
        let x = LEFT + slot * i as f64 + (slot - bar) / 2.0;
        let mut y = TOP + plot_h;
        let a = b.by_action;
        let tag_plain = a.tag.saturating_sub(b.would_quarantine);
        let would = a.tag.min(b.would_quarantine);
        h.raw("<g><title>");
        h.text(&format!(
            "{}: {} accept, {} tag ({} would be held), {} held, {} defer",
            utc(b.start),
            a.accept,
            a.tag,
            would,
            a.quarantine,
            a.defer
        ));
        h.raw("</title>");
        for (class, v) in [
            ("a", a.accept),
            ("t", tag_plain),
            ("w", would),
            ("q", a.quarantine),
            ("d", a.defer),
        ] {
            let height = v as f64 * scale;
            y -= height;
            rect(&mut h, class, x, y, bar, height);
        }
        h.raw("</g>");
    }
    // Dates under the first, middle and last bars.
    let len = buckets.len();
    let picks = [0, len / 2, len.saturating_sub(1)];
    for (k, &i) in picks.iter().enumerate() {
        if k > 0 && picks.get(k - 1) == Some(&i) {
            continue;
        }
        let Some(b) = buckets.get(i) else { continue };
        let text = if width < 86_400 {
            utc(b.start)
        } else {
            utc(b.start).chars().take(10).collect()
        };
        let (class, x) = if k == 0 {
            ("xl0", LEFT + slot * i as f64)
        } else if i + 1 == len && len > 2 {
            ("xl9", LEFT + slot * (i + 1) as f64)
        } else {
            ("xl", LEFT + slot * i as f64 + slot / 2.0)
        };
        label(&mut h, class, x, VH - 7.0, &text);
    }
    if total == 0 {
        label(
            &mut h,
            "none",
            LEFT + plot_w / 2.0,
            TOP + plot_h / 2.0,
            "no verdicts in this window",
        );
    }
    h.raw("</svg>");
    h
}

const MH: f64 = 190.0;

/// Mirrored histogram of reported margins: legitimate mail above the axis, junk below,
/// with the section's thresholds drawn when they are on the margin.
pub fn margins(hist: &MarginHistogram, section: &Section, title: &str) -> Html {
    let mut h = Html::new();
    h.raw("<svg class=\"chart\" viewBox=\"0 0 1000 190\" width=\"1000\" height=\"190\" role=\"img\" aria-label=\"")
        .attr(title)
        .raw("\"><title>")
        .text(title)
        .raw("</title>");
    let plot_w = VW - LEFT - RIGHT;
    let half = (MH - TOP - BOTTOM) / 2.0;
    let axis = TOP + half;
    let top = nice_ceiling(
        hist.legitimate
            .iter()
            .chain(hist.junk.iter())
            .copied()
            .max()
            .unwrap_or(0),
    );
    let scale = half / top as f64;
    let bins = hist.bins;
    let x_of = |m: f64| LEFT + (m - bins.low) / (bins.high - bins.low) * plot_w;
    line(&mut h, "grid", LEFT, TOP, VW - RIGHT, TOP);
    line(&mut h, "grid", LEFT, axis + half, VW - RIGHT, axis + half);
    label(&mut h, "yl", LEFT - 5.0, TOP + 3.5, &count(top));
    label(&mut h, "yl", LEFT - 5.0, axis + 3.5, "0");
    label(&mut h, "yl", LEFT - 5.0, axis + half + 3.5, &count(top));
    let bw = plot_w / f64::from(bins.count.max(1));
    for i in 0..bins.count as usize {
        let x = LEFT + bw * i as f64;
        let legit = hist.legitimate.get(i).copied().unwrap_or(0);
        let junk = hist.junk.get(i).copied().unwrap_or(0);
        if legit + junk == 0 {
            continue;
        }
        let lo = bins.lower_edge(i);
        h.raw("<g><title>");
        h.text(&format!(
            "margin {:+.2} to {:+.2}: {legit} legitimate, {junk} junk",
            lo,
            lo + bins.width()
        ));
        h.raw("</title>");
        let lh = legit as f64 * scale;
        rect(&mut h, "l", x + 0.5, axis - lh, bw - 1.0, lh);
        rect(&mut h, "j", x + 0.5, axis, bw - 1.0, junk as f64 * scale);
        h.raw("</g>");
    }
    line(&mut h, "ax", LEFT, axis, VW - RIGHT, axis);
    // Whole-number margins along the bottom.
    let mut m = bins.low.ceil();
    let step = ((bins.high - bins.low) / 12.0).ceil().max(1.0);
    while m <= bins.high {
        let x = x_of(m);
        line(&mut h, "tick", x, axis + half, x, axis + half + 3.0);
        label(&mut h, "xl", x, MH - 7.0, &format!("{m:+.0}"));
        m += step;
    }
    if section.thresholds.scale() == Scale::Margin {
        let t = section.thresholds;
        for (class, lclass, value, name) in [
            ("tl", "tlt", t.tag(), "tag"),
            ("ql", "qlt", t.quarantine(), "hold"),
        ] {
            if value >= bins.low && value <= bins.high {
                let x = x_of(value);
                line(&mut h, class, x, TOP, x, axis + half);
                label(
                    &mut h,
                    lclass,
                    x + 3.0,
                    TOP + 10.0,
                    &format!("{name} ≥ {value:+.2}"),
                );
            }
        }
    }
    label(&mut h, "side", LEFT + 4.0, TOP + 11.0, "legitimate ▲");
    label(&mut h, "side", LEFT + 4.0, axis + half - 4.0, "junk ▼");
    if hist.total() == 0 {
        label(
            &mut h,
            "none",
            LEFT + plot_w / 2.0,
            axis - 6.0,
            "no reported mail in this window",
        );
    }
    h.raw("</svg>");
    h
}

/// Smallest rate on the interval chart's log scale.
const FLOOR: f64 = 1e-5;

/// The false-positive estimate and its 95% interval on a log scale, against the target.
pub fn interval(rate: &Rate, target: f64, check: TargetCheck, title: &str) -> Html {
    let (w, left, right) = (340.0, 6.0, 6.0);
    let plot = w - left - right;
    let x_of = |r: f64| {
        let r = r.clamp(FLOOR, 1.0);
        left + (r.log10() - FLOOR.log10()) / -FLOOR.log10() * plot
    };
    let mut h = Html::new();
    h.raw("<svg class=\"iv\" viewBox=\"0 0 340 40\" width=\"340\" height=\"40\" role=\"img\" aria-label=\"")
        .attr(title)
        .raw("\"><title>")
        .text(title)
        .raw("</title>");
    rect(&mut h, "track", left, 12.0, plot, 8.0);
    let names = ["0.001%", "0.01%", "0.1%", "1%", "10%", "100%"];
    for (k, name) in names.iter().enumerate() {
        let x = x_of(FLOOR * 10f64.powi(k as i32));
        line(&mut h, "tick", x, 20.0, x, 24.0);
        let class = match k {
            0 => "il0",
            5 => "il5",
            _ => "il",
        };
        label(&mut h, class, x, 34.0, name);
    }
    if rate.of > 0 {
        let class = match check {
            TargetCheck::Met => "met",
            TargetCheck::Missed => "missed",
            TargetCheck::Undecided => "undecided",
        };
        let (a, b) = (x_of(rate.lower), x_of(rate.upper));
        rect(&mut h, class, a, 10.0, (b - a).max(2.0), 12.0);
        if let Some(v) = rate.value {
            let x = if v > 0.0 { x_of(v) } else { left };
            h.raw("<circle class=\"est\" cx=\"");
            n(&mut h, x);
            h.raw("\" cy=\"16\" r=\"3.2\"/>");
        }
    }
    let tx = x_of(target);
    line(&mut h, "target", tx, 4.0, tx, 26.0);
    h.raw("</svg>");
    h
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::MarginBins;

    #[test]
    fn nice_ceilings_are_round() {
        assert_eq!(nice_ceiling(0), 1);
        assert_eq!(nice_ceiling(3), 5);
        assert_eq!(nice_ceiling(11), 20);
        assert_eq!(nice_ceiling(500), 500);
        assert_eq!(nice_ceiling(501), 1000);
        assert!(nice_ceiling(u64::MAX) >= u64::MAX / 10);
    }

    #[test]
    fn charts_draw_one_bar_part_per_nonzero_count() {
        let mut b = VolumeBucket::default();
        b.add(
            crate::policy::Action::Accept,
            crate::policy::Action::Accept,
            7,
        );
        b.add(
            crate::policy::Action::Tag,
            crate::policy::Action::Quarantine,
            2,
        );
        let svg = volume(&[b, VolumeBucket::default()], 3600, "v").finish();
        assert_eq!(svg.matches("<rect class=\"a\"").count(), 1);
        assert_eq!(svg.matches("<rect class=\"w\"").count(), 1);
        assert_eq!(svg.matches("<rect class=\"q\"").count(), 0);
        assert!(svg.contains("7 accept, 2 tag (2 would be held)"), "{svg}");

        let mut hist = MarginHistogram::empty(MarginBins::new(-1.0, 1.0, 4).expect("bins"));
        hist.add(Some(0.9), false);
        let section = super::super::page::Section::of(&crate::policy::Policy::default(), "x");
        let svg = margins(&hist, &section, "m").finish();
        assert_eq!(svg.matches("<rect class=\"l\"").count(), 1);
        assert!(svg.contains("hold ≥ +1.00"), "{svg}");
    }
}
