//! The `--report` page: one self-contained HTML file (no network, no script): the summary,
//! the per-class table, a confusion-matrix heatmap, the reliability diagram, the threshold
//! curve, and thumbnails of the wrong frames with their scores (embedded as data URIs).

use std::fmt::Write as _;
use std::path::Path;

use super::report::Document;
use super::summary::{Prediction, Summary};

/// Most wrong frames shown as thumbnails (the JSON lists them all).
pub const MAX_THUMBNAILS: usize = 120;

/// The page for `doc`; `root` is the set (thumbnails are read from it).
pub fn page(doc: &Document, root: &Path) -> String {
    let s = &doc.summary;
    let mut o = String::new();
    let title = format!("{} {}: evaluation on {}", esc(&doc.id.model), esc(&doc.id.version), esc(&doc.set));
    let _ = write!(
        o,
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{title}</title><style>{CSS}</style></head><body>\
         <h1>{title}</h1><p class=\"note\">lineside assists inspection; these figures describe this set of frames only \
         and do not replace the plant's safety systems or qualified sign-off.</p>"
    );
    summary_table(&mut o, doc);
    let _ = write!(o, "<h2>Per class</h2>");
    class_table(&mut o, s);
    let _ = write!(
        o,
        "<div class=\"charts\"><figure><figcaption>Confusion matrix (rows true, columns predicted; shade = share of the row)</figcaption>{}</figure>",
        heatmap(s)
    );
    match s.ece {
        Some(e) => {
            let _ = write!(
                o,
                "<figure><figcaption>Reliability: accuracy per top-score bin (15 bins), ECE {e:.4}</figcaption>{}</figure>",
                reliability(s)
            );
        }
        None => {
            let _ =
                write!(o, "<figure><figcaption>Reliability: n/a (the scores are not softmax)</figcaption></figure>");
        }
    }
    let _ = write!(
        o,
        "<figure><figcaption>Threshold trade-off: frames sent to review and error among the rest, by min_score</figcaption>{}</figure></div>",
        threshold_curve(s)
    );
    if let Some(v) = &s.verdicts {
        verdict_table(&mut o, v);
    }
    if let Some(sug) = &doc.suggestion {
        let _ = write!(o, "<p><b>Target error {:.2}%:</b> {}</p>", sug.target_error * 100.0, esc(&sug.statement));
    }
    if let Some(a) = &doc.against {
        against(&mut o, doc, a);
    }
    wrong_frames(&mut o, &doc.predictions, root);
    if !doc.failed.is_empty() {
        let _ = write!(
            o,
            "<h2>Failed frames ({})</h2><table><tr><th>frame</th><th>kind</th><th>message</th></tr>",
            doc.failed.len()
        );
        for f in &doc.failed {
            let _ =
                write!(o, "<tr><td>{}</td><td>{}</td><td>{}</td></tr>", esc(&f.file), esc(&f.kind), esc(&f.message));
        }
        let _ = write!(o, "</table>");
    }
    o.push_str("</body></html>\n");
    o
}

const CSS: &str = "body{font:14px/1.4 system-ui,sans-serif;margin:24px;color:#1b1b1b;max-width:1200px}\
h1{font-size:20px}h2{font-size:16px;margin-top:28px}.note{color:#555}\
table{border-collapse:collapse;margin:8px 0}td,th{border:1px solid #ccc;padding:3px 8px;text-align:right}\
td:first-child,th:first-child{text-align:left}.charts{display:flex;flex-wrap:wrap;gap:24px}\
figure{margin:0}figcaption{font-weight:600;margin-bottom:6px;max-width:420px}\
.thumbs{display:flex;flex-wrap:wrap;gap:10px}.thumb{width:170px;font-size:12px}.thumb img{display:block;max-width:160px}\
.bad{color:#b00020}";

fn against(o: &mut String, doc: &Document, a: &super::report::Against) {
    let s = &doc.summary;
    let c = &a.comparison;
    let _ = write!(
        o,
        "<h2>Against {} {}</h2><p>Same {} frames: accuracy {:.4} (candidate) vs {:.4}; agreement {:.1}%; only {} right {}, \
         only the candidate right {}; McNemar exact p = {:.4}.</p>",
        esc(&a.id.model),
        esc(&a.id.version),
        c.compared,
        a.summary.accuracy,
        s.accuracy,
        c.agreement * 100.0,
        esc(&doc.id.model),
        c.only_model_right,
        c.only_candidate_right,
        c.mcnemar_p
    );
    let _ = write!(o, "<table><tr><th>frame</th><th>truth</th><th>model</th><th>candidate</th></tr>");
    for d in &c.disagreements {
        let _ = write!(
            o,
            "<tr><td>{}</td><td>{}</td><td>{} {:.3}</td><td>{} {:.3}</td></tr>",
            esc(&d.file),
            esc(&d.truth),
            esc(&d.label),
            d.score,
            esc(&d.against_label),
            d.against_score
        );
    }
    let _ = write!(o, "</table>");
}

fn summary_table(o: &mut String, doc: &Document) {
    let s = &doc.summary;
    let a = &s.accuracy_interval;
    let _ = write!(
        o,
        "<table><tr><th>frames evaluated</th><td>{}</td></tr><tr><th>failed</th><td>{}</td></tr>\
         <tr><th>accuracy (95% Clopper–Pearson)</th><td>{:.4} ({:.4}–{:.4})</td></tr>\
         <tr><th>balanced accuracy</th><td>{:.4}</td></tr>",
        s.frames,
        doc.failed.len(),
        s.accuracy,
        a.low,
        a.high,
        s.balanced_accuracy
    );
    for (k, v) in &s.top_k {
        let _ = write!(o, "<tr><th>{} accuracy</th><td>{v:.4}</td></tr>", k.replace('_', "-"));
    }
    let ece = s.ece.map_or("n/a".to_string(), |e| format!("{e:.4}"));
    let _ = write!(o, "<tr><th>expected calibration error (15 bins)</th><td>{ece}</td></tr>");
    if !doc.absent.is_empty() {
        let _ = write!(o, "<tr><th>classes absent from the set</th><td>{}</td></tr>", esc(&doc.absent.join(", ")));
    }
    let _ = write!(o, "<tr><th>engine</th><td>{}</td></tr></table>", esc(&doc.id.engine));
}

/// Escapes, overkill and review at the model's min_score, and their trade-off.
fn verdict_table(o: &mut String, v: &crate::evaluate::verdicts::VerdictFigures) {
    let share = |p: &crate::evaluate::stats::Proportion| {
        format!("{} of {} ({:.2}%; 95% CI {:.2}–{:.2}%)", p.k, p.n, p.rate * 100.0, p.low * 100.0, p.high * 100.0)
    };
    let at = v
        .min_score
        .map_or_else(|| "min_score not set: nothing goes to review".to_owned(), |m| format!("at min_score {m:.4}"));
    let _ = write!(
        o,
        "<h2>Line verdicts ({at})</h2><table><tr><th>escapes: defective parts let pass</th><td>{}</td></tr>\
         <tr><th>overkill: good parts stopped</th><td>{}</td></tr><tr><th>held for review</th><td>{}</td></tr></table>\
         <table><tr><th>min_score</th><th>escapes</th><th>overkill</th><th>review</th></tr>",
        share(&v.escapes),
        share(&v.overkill),
        share(&v.review)
    );
    for t in super::report::SHOWN_THRESHOLDS {
        let p = &v.thresholds[t];
        let _ = write!(
            o,
            "<tr><td>{:.2}</td><td>{:.2}%</td><td>{:.2}%</td><td>{:.2}%</td></tr>",
            p.min_score,
            p.escape_rate * 100.0,
            p.overkill_rate * 100.0,
            p.review_rate * 100.0
        );
    }
    let _ = write!(o, "</table>");
}

fn class_table(o: &mut String, s: &Summary) {
    let _ = write!(
        o,
        "<table><tr><th>class</th><th>precision</th><th>recall</th><th>recall 95% CI</th><th>F1</th><th>support</th></tr>"
    );
    for c in &s.per_class {
        let _ = write!(
            o,
            "<tr><td>{}</td><td>{:.4}</td><td>{:.4}</td><td>{:.3}–{:.3}</td><td>{:.4}</td><td>{}</td></tr>",
            esc(&c.label),
            c.precision,
            c.recall,
            c.recall_interval[0],
            c.recall_interval[1],
            c.f1,
            c.support
        );
    }
    for (name, v) in [("macro avg", s.macro_avg), ("weighted avg", s.weighted_avg)] {
        let _ = write!(
            o,
            "<tr><td>{name}</td><td>{:.4}</td><td>{:.4}</td><td></td><td>{:.4}</td><td>{}</td></tr>",
            v.precision, v.recall, v.f1, s.frames
        );
    }
    let _ = write!(o, "</table>");
}

fn heatmap(s: &Summary) -> String {
    let labels = &s.confusion.labels;
    let n = labels.len();
    let (cell, left, top) = (48.0, 90.0, 90.0);
    let size = |k: usize| k as f64 * cell;
    let mut o = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{}\" height=\"{}\" font-size=\"11\" font-family=\"sans-serif\">",
        left + size(n) + 10.0,
        top + size(n) + 10.0
    );
    for (i, l) in labels.iter().enumerate() {
        let c = size(i) + cell / 2.0;
        let _ = write!(o, "<text x=\"{}\" y=\"{}\" text-anchor=\"end\">{}</text>", left - 6.0, top + c + 4.0, esc(l));
        let _ = write!(o, "<text transform=\"translate({},{}) rotate(-45)\">{}</text>", left + c, top - 6.0, esc(l));
    }
    for (i, row) in s.confusion.matrix.iter().enumerate() {
        let total: u64 = row.iter().sum();
        for (j, &v) in row.iter().enumerate() {
            let share = if total == 0 { 0.0 } else { v as f64 / total as f64 };
            // Right answers in blue, wrong ones in red; the shade is the share of the row.
            let (r, g, b) = if i == j { (31, 94, 168) } else { (190, 30, 45) };
            let _ = write!(
                o,
                "<rect x=\"{}\" y=\"{}\" width=\"{cell}\" height=\"{cell}\" fill=\"rgb({r},{g},{b})\" fill-opacity=\"{:.3}\" stroke=\"#bbb\"/>\
                 <text x=\"{}\" y=\"{}\" text-anchor=\"middle\" fill=\"{}\">{v}</text>",
                left + size(j),
                top + size(i),
                0.08 + 0.92 * share,
                left + size(j) + cell / 2.0,
                top + size(i) + cell / 2.0 + 4.0,
                if share > 0.55 { "#fff" } else { "#111" }
            );
        }
    }
    o + "</svg>"
}

/// Axes of a 0..1 x 0..1 chart; returns the SVG opening and a point mapper.
fn unit_axes(xlabel: &str, ylabel: &str) -> (String, impl Fn(f64, f64) -> (f64, f64)) {
    let (w, h, l, t) = (300.0, 240.0, 50.0, 10.0);
    let map = move |x: f64, y: f64| (l + x * w, t + (1.0 - y) * h);
    let mut o = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{}\" height=\"{}\" font-size=\"11\" font-family=\"sans-serif\">\
         <rect x=\"{l}\" y=\"{t}\" width=\"{w}\" height=\"{h}\" fill=\"none\" stroke=\"#888\"/>",
        l + w + 20.0,
        t + h + 40.0
    );
    for k in 0..=4 {
        let v = f64::from(k) / 4.0;
        let (x, y) = map(v, v);
        let _ = write!(o, "<text x=\"{x}\" y=\"{}\" text-anchor=\"middle\">{v:.2}</text>", t + h + 14.0);
        let _ = write!(o, "<text x=\"{}\" y=\"{}\" text-anchor=\"end\">{v:.2}</text>", l - 4.0, y + 4.0);
    }
    let _ =
        write!(o, "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\">{}</text>", l + w / 2.0, t + h + 32.0, esc(xlabel));
    let _ = write!(
        o,
        "<text transform=\"translate(12,{}) rotate(-90)\" text-anchor=\"middle\">{}</text>",
        t + h / 2.0,
        esc(ylabel)
    );
    (o, map)
}

fn reliability(s: &Summary) -> String {
    let (mut o, map) = unit_axes("top score (confidence)", "accuracy");
    let (x0, y0) = map(0.0, 0.0);
    let (x1, y1) = map(1.0, 1.0);
    let _ =
        write!(o, "<line x1=\"{x0}\" y1=\"{y0}\" x2=\"{x1}\" y2=\"{y1}\" stroke=\"#999\" stroke-dasharray=\"4 3\"/>");
    for b in s.reliability.iter().filter(|b| b.count > 0) {
        let (xa, ya) = map(b.low, b.accuracy);
        let (xb, yb) = map(b.high, 0.0);
        let _ = write!(
            o,
            "<rect x=\"{xa:.1}\" y=\"{ya:.1}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"#1f5ea8\" fill-opacity=\"0.75\"><title>{:.2}-{:.2}: {} frames, accuracy {:.3}, confidence {:.3}</title></rect>",
            xb - xa - 1.0,
            yb - ya,
            b.low,
            b.high,
            b.count,
            b.accuracy,
            b.confidence
        );
    }
    o + "</svg>"
}

fn threshold_curve(s: &Summary) -> String {
    let (mut o, map) = unit_axes("min_score", "share of frames");
    for (colour, name, f) in [
        ("#1f5ea8", "sent to review", (|p: &super::summary::ThresholdPoint| p.review) as fn(&_) -> f64),
        ("#be1e2d", "error among the rest", |p| p.residual_error),
    ] {
        let pts: Vec<String> = s
            .thresholds
            .iter()
            .map(|p| {
                let (x, y) = map(p.min_score, f(p));
                format!("{x:.1},{y:.1}")
            })
            .collect();
        let _ = write!(
            o,
            "<polyline fill=\"none\" stroke=\"{colour}\" stroke-width=\"2\" points=\"{}\"><title>{name}</title></polyline>",
            pts.join(" ")
        );
    }
    let (lx, ly) = map(0.04, 0.95);
    let _ = write!(
        o,
        "<text x=\"{lx}\" y=\"{ly}\" fill=\"#1f5ea8\">sent to review</text><text x=\"{lx}\" y=\"{}\" fill=\"#be1e2d\">error among the rest</text>",
        ly + 14.0
    );
    o + "</svg>"
}

fn wrong_frames(o: &mut String, preds: &[Prediction], root: &Path) {
    let wrong: Vec<&Prediction> = preds.iter().filter(|p| !p.right()).collect();
    let _ = write!(o, "<h2>Wrong frames ({})</h2>", wrong.len());
    if wrong.len() > MAX_THUMBNAILS {
        let _ = write!(o, "<p>The first {MAX_THUMBNAILS} are shown; the JSON lists them all.</p>");
    }
    let base = super::dataset::base_of(root);
    let _ = write!(o, "<div class=\"thumbs\">");
    for p in wrong.iter().take(MAX_THUMBNAILS) {
        let img = thumbnail(&base.join(&p.file)).map_or_else(
            || "<i>(no preview)</i>".to_string(),
            |d| format!("<img alt=\"{}\" src=\"data:image/png;base64,{d}\">", esc(&p.file)),
        );
        let truth_score = p.scores.get(p.truth_index).copied().unwrap_or(f32::NAN);
        let _ = write!(
            o,
            "<div class=\"thumb\">{img}<div>{}</div><div>truth <b>{}</b> ({truth_score:.3})</div><div class=\"bad\">predicted <b>{}</b> ({:.3})</div></div>",
            esc(&p.file),
            esc(&p.truth),
            esc(&p.label),
            p.score
        );
    }
    let _ = write!(o, "</div>");
}

/// A PNG thumbnail (at most 160 px a side) of the frame at `path`, base64-encoded.
fn thumbnail(path: &Path) -> Option<String> {
    let img = image::open(path).ok()?.thumbnail(160, 160);
    let mut png = Vec::new();
    img.write_to(&mut std::io::Cursor::new(&mut png), image::ImageFormat::Png).ok()?;
    Some(base64(&png))
}

/// Standard base64 with padding (RFC 4648, section 4).
pub fn base64(data: &[u8]) -> String {
    const A: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::with_capacity(data.len().div_ceil(3) * 4);
    for chunk in data.chunks(3) {
        let b = [chunk[0], chunk.get(1).copied().unwrap_or(0), chunk.get(2).copied().unwrap_or(0)];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for i in 0..4 {
            if i <= chunk.len() {
                out.push(char::from(A[((n >> (18 - 6 * i)) & 63) as usize]));
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// Escape text for HTML.
fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::base64;

    #[test]
    fn base64_matches_the_rfc_4648_test_vectors() {
        // RFC 4648, section 10.
        for (plain, enc) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(plain.as_bytes()), enc);
        }
    }
}
