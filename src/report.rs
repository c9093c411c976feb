//! The HTML report: one self-contained file (inline CSS and SVG, no script, no external
//! assets) rendered from audit and baseline records.
//!
//! A report holds one or more sections; an audit section has an overview of verdicts and
//! scores, then for each row the three attributions side by side per group, the
//! distribution of each family's p-values against the calibration distribution, the
//! baseline ranking and the reasons, and for image inputs heat maps of the attributions on
//! the patch grid. Colours come from the Okabe-Ito palette, which stays distinguishable
//! under the common colour-vision deficiencies; every colour is paired with a text label.

use std::fmt::Write as _;

use ndarray::Array2;

use crate::audit::{AuditRecord, BaselineRecord, Verdict, P_BINS};
use crate::baselines::ImageShape;
use crate::groups::Groups;

/// The caution every report carries (DEVELOPERS.md).
pub const CAUTION: &str = "A kilter score is a diagnostic, not a guarantee. Decisions that \
rest on model explanations defer to the applicable regulations and to the organisation's \
model-risk practice.";

/// Rows given a detailed panel; the records file holds every row.
pub const DETAILED_ROWS: usize = 60;
/// Groups drawn in an attribution chart (the largest by absolute attribution).
const CHART_GROUPS: usize = 16;

const DELETION: &str = "#E69F00";
const REPLACEMENT: &str = "#0072B2";
const INTERPOLATION: &str = "#009E73";

/// An audit to render.
pub struct AuditSection<'a> {
    /// Heading of the section.
    pub title: String,
    /// One line on what was run (settings).
    pub settings: String,
    pub groups: &'a Groups,
    pub records: &'a [AuditRecord],
    /// A label per input row (ids), when the input had them.
    pub labels: Option<&'a [String]>,
    /// Image inputs: the shape and the input rows, for heat maps.
    pub image: Option<(ImageShape, &'a Array2<f64>)>,
}

/// A baseline ranking to render.
pub struct BaselineSection<'a> {
    pub title: String,
    pub settings: String,
    pub records: &'a [BaselineRecord],
    pub labels: Option<&'a [String]>,
}

/// A report under construction.
pub struct Report {
    title: String,
    body: String,
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn verdict_badge(v: Verdict) -> String {
    format!("<span class=\"badge {0}\">{0}</span>", v.as_str())
}

impl Report {
    /// An empty report.
    pub fn new(title: &str) -> Report {
        Report {
            title: title.to_string(),
            body: String::new(),
        }
    }

    /// Adds an audit section.
    pub fn audit(&mut self, s: &AuditSection<'_>) -> &mut Self {
        let b = &mut self.body;
        let label = |r: usize| match s.labels {
            Some(l) if r < l.len() => format!("{} (row {r})", escape(&l[r])),
            _ => format!("row {r}"),
        };
        let counts = [Verdict::Reliable, Verdict::Doubtful, Verdict::Unreliable]
            .map(|v| s.records.iter().filter(|r| r.verdict == v).count());
        let _ = write!(
            b,
            "<section class=\"audit\"><h2>{}</h2><p class=\"settings\">{}</p>\
             <div class=\"counts\"><span class=\"badge reliable\">reliable {}</span>\
             <span class=\"badge doubtful\">doubtful {}</span>\
             <span class=\"badge unreliable\">unreliable {}</span></div>",
            escape(&s.title),
            escape(&s.settings),
            counts[0],
            counts[1],
            counts[2]
        );
        b.push_str(
            "<h3>Overview</h3><table class=\"overview\"><thead><tr><th>input</th><th>target</th>\
             <th>prediction</th><th>reliability</th><th>verdict</th><th>main finding</th></tr>\
             </thead><tbody>",
        );
        for r in s.records {
            let _ = write!(
                b,
                "<tr><td><a href=\"#{}-row-{}\">{}</a></td><td>{}</td><td>{:.3}</td><td>{}</td>\
                 <td>{}</td><td class=\"reason\">{}</td></tr>",
                anchor(&s.title),
                r.row,
                label(r.row),
                r.target,
                r.prediction,
                score_bar(r.reliability),
                verdict_badge(r.verdict),
                escape(&r.findings.first().map_or_else(
                    || "nothing to report".to_string(),
                    |f| format!("{}: {}", f.severity.as_str(), f.title)
                ))
            );
        }
        b.push_str("</tbody></table>");
        for r in s.records.iter().take(DETAILED_ROWS) {
            let _ = write!(
                b,
                "<article class=\"row\" id=\"{}-row-{}\"><h3>{} {} <span class=\"score\">\
                 reliability {}</span></h3><p>target output {}, prediction {:.4}; the input \
                 itself has p = {:.3}</p>",
                anchor(&s.title),
                r.row,
                label(r.row),
                verdict_badge(r.verdict),
                crate::audit::reliability::score_text(r.reliability),
                r.target,
                r.prediction,
                r.input_p
            );
            b.push_str("<div class=\"panels\"><div class=\"panel\"><h4>Attribution per group</h4>");
            b.push_str(&attribution_chart(r, s.groups.names()));
            b.push_str("</div><div class=\"panel\"><h4>Where the perturbed inputs fall</h4>");
            b.push_str(&p_value_chart(r));
            b.push_str("</div></div>");
            if let Some((shape, inputs)) = &s.image {
                if r.row < inputs.nrows() {
                    b.push_str("<h4>Attribution on the image (patches)</h4><div class=\"maps\">");
                    b.push_str(&image_maps(r, s.groups, *shape, inputs.row(r.row)));
                    b.push_str("</div>");
                }
            }
            let _ = write!(
                b,
                "<div class=\"panels\"><div class=\"panel\"><h4>Findings</h4><p>Judged: {}.</p>",
                escape(&match (r.subject.as_str(), &r.method) {
                    ("supplied", Some(m)) => format!("the supplied explanation, declared {m}"),
                    ("supplied", None) => "the supplied explanation".to_string(),
                    _ => format!("kilter's deletion to {}", r.families.deletion.fill),
                })
            );
            if r.findings.is_empty() {
                b.push_str("<p>Nothing to report.</p>");
            } else {
                b.push_str("<ul class=\"reasons\">");
                for f in &r.findings {
                    let _ = write!(
                        b,
                        "<li><b>{}: {}</b> <code>{}</code> {}</li>",
                        f.severity.as_str(),
                        escape(&f.title),
                        escape(&f.code),
                        escape(&f.reason)
                    );
                }
                b.push_str("</ul>");
            }
            b.push_str("</div><div class=\"panel\"><h4>Baselines of the path</h4>");
            if !r.families.interpolation.applicable {
                b.push_str(
                    "<p class=\"small\">Integrated gradients do not apply to this model \
                     (piecewise-constant); the ranking is shown for completeness.</p>",
                );
            }
            b.push_str(&candidate_table(&r.families.interpolation.candidates));
            b.push_str("</div></div></article>");
        }
        if s.records.len() > DETAILED_ROWS {
            let _ = write!(
                b,
                "<p>Detailed panels for the first {DETAILED_ROWS} of {} rows; the records file \
                 holds every row.</p>",
                s.records.len()
            );
        }
        b.push_str("</section>");
        self
    }

    /// Adds a baseline-ranking section.
    pub fn baselines(&mut self, s: &BaselineSection<'_>) -> &mut Self {
        let b = &mut self.body;
        let _ = write!(
            b,
            "<section class=\"baselines\"><h2>{}</h2><p class=\"settings\">{}</p>",
            escape(&s.title),
            escape(&s.settings)
        );
        let mut wins: Vec<(String, usize)> = Vec::new();
        for r in s.records {
            match wins.iter_mut().find(|(n, _)| *n == r.recommended) {
                Some(w) => w.1 += 1,
                None => wins.push((r.recommended.clone(), 1)),
            }
        }
        wins.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
        b.push_str("<p>Recommended: ");
        let listed: Vec<String> = wins
            .iter()
            .map(|(n, c)| format!("<b>{}</b> on {c} rows", escape(n)))
            .collect();
        b.push_str(&listed.join(", "));
        b.push_str("</p>");
        for r in s.records.iter().take(DETAILED_ROWS) {
            let label = match s.labels {
                Some(l) if r.row < l.len() => format!("{} (row {})", escape(&l[r.row]), r.row),
                _ => format!("row {}", r.row),
            };
            let _ = write!(
                b,
                "<article class=\"row\"><h3>{label}: {}</h3>",
                escape(&r.recommended)
            );
            b.push_str(&candidate_table(&r.candidates));
            b.push_str("</article>");
        }
        b.push_str("</section>");
        self
    }

    /// The whole page.
    pub fn finish(&self) -> String {
        format!(
            "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
             <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
             <title>{title}</title><style>{STYLE}</style></head><body><header><h1>{title}</h1>\
             <p class=\"caution\">{CAUTION}</p></header><main>{body}</main><footer>\
             <p>{CAUTION}</p><p>Written by kilter {version}. Records hold every number shown \
             here.</p></footer></body></html>\n",
            title = escape(&self.title),
            body = self.body,
            version = env!("CARGO_PKG_VERSION"),
        )
    }
}

fn anchor(title: &str) -> String {
    title
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '-'
            }
        })
        .collect()
}

fn score_bar(score: f64) -> String {
    let colour = match Verdict::for_score(score) {
        Verdict::Reliable => INTERPOLATION,
        Verdict::Doubtful => DELETION,
        Verdict::Unreliable => "#D55E00",
    };
    let text = crate::audit::reliability::score_text(score);
    format!(
        "<svg class=\"bar\" width=\"104\" height=\"14\" role=\"img\" aria-label=\"{text}\">\
         <rect x=\"0\" y=\"2\" width=\"100\" height=\"10\" fill=\"#eeeeee\"/>\
         <rect x=\"0\" y=\"2\" width=\"{:.1}\" height=\"10\" fill=\"{colour}\"/></svg> {text}",
        100.0 * score.clamp(0.0, 1.0)
    )
}

/// Three bars per group, around a zero axis.
fn attribution_chart(r: &AuditRecord, names: &[String]) -> String {
    let f = &r.families;
    let mut series = vec![
        ("deletion", DELETION, &f.deletion.attribution),
        ("replacement", REPLACEMENT, &f.replacement.attribution),
    ];
    if f.interpolation.applicable {
        series.push(("interpolation", INTERPOLATION, &f.interpolation.attribution));
    }
    let m = names.len();
    let mut order: Vec<usize> = (0..m).collect();
    let size = |g: usize| series.iter().map(|s| s.2[g].abs()).fold(0.0, f64::max);
    order.sort_by(|&a, &b| size(b).total_cmp(&size(a)).then(a.cmp(&b)));
    order.truncate(CHART_GROUPS);
    let largest = order
        .iter()
        .map(|&g| size(g))
        .fold(0.0_f64, f64::max)
        .max(1e-300);
    let (label_w, half, row_h) = (170.0, 150.0, 26.0);
    let width = label_w + 2.0 * half + 10.0;
    let height = 30.0 + row_h * order.len() as f64;
    let mut svg = format!(
        "<svg class=\"chart\" viewBox=\"0 0 {width} {height}\" width=\"{width}\" \
         height=\"{height}\" role=\"img\" aria-label=\"attribution per group\">"
    );
    let mut x = label_w;
    for (name, colour, _) in &series {
        let _ = write!(
            svg,
            "<rect x=\"{x}\" y=\"4\" width=\"10\" height=\"10\" fill=\"{colour}\"/>\
             <text x=\"{}\" y=\"13\" class=\"small\">{name}</text>",
            x + 14.0
        );
        x += 100.0;
    }
    let axis = label_w + half;
    let _ = write!(
        svg,
        "<line x1=\"{axis}\" y1=\"22\" x2=\"{axis}\" y2=\"{height}\" stroke=\"#888\"/>"
    );
    for (i, &g) in order.iter().enumerate() {
        let top = 24.0 + row_h * i as f64;
        let _ = write!(
            svg,
            "<text x=\"{}\" y=\"{}\" class=\"small\" text-anchor=\"end\">{}</text>",
            label_w - 6.0,
            top + 15.0,
            escape(&names[g])
        );
        for (j, (name, colour, values)) in series.iter().enumerate() {
            let v = values[g];
            let w = half * v.abs() / largest;
            let left = if v < 0.0 { axis - w } else { axis };
            let _ = write!(
                svg,
                "<rect x=\"{left:.1}\" y=\"{:.1}\" width=\"{w:.1}\" height=\"6\" fill=\"{colour}\">\
                 <title>{name}: {v:.4}</title></rect>",
                top + 3.0 + 7.0 * j as f64
            );
        }
    }
    svg.push_str("</svg>");
    if let Some(why) = &f.interpolation.not_applicable {
        let _ = write!(
            svg,
            "<p class=\"small\">Integrated gradients are not drawn: {}.</p>",
            escape(why)
        );
    }
    if m > order.len() {
        let _ = write!(
            svg,
            "<p class=\"small\">The {} largest of {m} groups.</p>",
            order.len()
        );
    }
    svg
}

/// The share of each family's inputs per p-value bin, against the calibration
/// distribution (a bin's width: conformal p-values are uniform on data like the reference).
fn p_value_chart(r: &AuditRecord) -> String {
    let f = &r.families;
    let mut series = vec![
        (
            "deletion",
            DELETION,
            &f.deletion.p_histogram,
            f.deletion.off_manifold_rate,
        ),
        (
            "replacement",
            REPLACEMENT,
            &f.replacement.p_histogram,
            f.replacement.off_manifold_rate,
        ),
    ];
    if f.interpolation.applicable {
        series.push((
            "interpolation",
            INTERPOLATION,
            &f.interpolation.p_histogram,
            f.interpolation.off_manifold_rate,
        ));
    }
    let bins = P_BINS.len() - 1;
    let (left, bin_w, plot_h) = (40.0, 54.0, 120.0);
    let width = left + bin_w * bins as f64 + 10.0;
    let height = plot_h + 60.0;
    let mut svg = format!(
        "<svg class=\"chart\" viewBox=\"0 0 {width} {height}\" width=\"{width}\" \
         height=\"{height}\" role=\"img\" aria-label=\"p-values of the perturbed inputs\">"
    );
    let base = 20.0 + plot_h;
    for k in 0..=4 {
        let y = base - plot_h * k as f64 / 4.0;
        let _ = write!(
            svg,
            "<line x1=\"{left}\" y1=\"{y}\" x2=\"{}\" y2=\"{y}\" stroke=\"#e5e5e5\"/>\
             <text x=\"{}\" y=\"{}\" class=\"small\" text-anchor=\"end\">{}%</text>",
            width - 10.0,
            left - 4.0,
            y + 4.0,
            25 * k
        );
    }
    for b in 0..bins {
        let x0 = left + bin_w * b as f64;
        for (j, (name, colour, counts, _)) in series.iter().enumerate() {
            let total: usize = counts.iter().sum();
            let share = if total > 0 {
                counts[b] as f64 / total as f64
            } else {
                0.0
            };
            let h = plot_h * share;
            let _ = write!(
                svg,
                "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"14\" height=\"{h:.1}\" fill=\"{colour}\">\
                 <title>{name}: {:.0}% with p in [{}, {})</title></rect>",
                x0 + 5.0 + 15.0 * j as f64,
                base - h,
                100.0 * share,
                P_BINS[b],
                P_BINS[b + 1]
            );
        }
        let expected = P_BINS[b + 1] - P_BINS[b];
        let y = base - plot_h * expected;
        let _ = write!(
            svg,
            "<line x1=\"{:.1}\" y1=\"{y:.1}\" x2=\"{:.1}\" y2=\"{y:.1}\" stroke=\"#222\" \
             stroke-dasharray=\"3,2\"><title>calibration rows: {:.1}%</title></line>\
             <text x=\"{:.1}\" y=\"{}\" class=\"small\" text-anchor=\"middle\">&lt;{}</text>",
            x0 + 3.0,
            x0 + bin_w - 3.0,
            100.0 * expected,
            x0 + bin_w / 2.0,
            base + 14.0,
            P_BINS[b + 1]
        );
    }
    let _ = write!(
        svg,
        "<text x=\"{left}\" y=\"{}\" class=\"small\">p_combined bins; dashed: share of calibration \
         rows (uniform)</text>",
        base + 32.0
    );
    svg.push_str("</svg><p class=\"small\">Off the data (p &lt; alpha): ");
    let parts: Vec<String> = series
        .iter()
        .map(|(name, _, _, rate)| format!("{name} {:.0}%", 100.0 * rate))
        .collect();
    svg.push_str(&parts.join(", "));
    if !f.interpolation.applicable {
        svg.push_str("; interpolation not applicable to this model");
    }
    svg.push_str("</p>");
    svg
}

/// Diverging colour for a value in [-1, 1]: orange for negative, blue for positive (both
/// ends of the Okabe-Ito palette), white at zero.
fn diverging(v: f64) -> String {
    let t = v.clamp(-1.0, 1.0);
    let (end, a) = if t < 0.0 {
        ((230.0, 159.0, 0.0), -t)
    } else {
        ((0.0, 114.0, 178.0), t)
    };
    let mix = |e: f64| (255.0 + (e - 255.0) * a).round() as u8;
    format!("#{:02x}{:02x}{:02x}", mix(end.0), mix(end.1), mix(end.2))
}

fn image_maps(
    r: &AuditRecord,
    groups: &Groups,
    shape: ImageShape,
    pixels: ndarray::ArrayView1<'_, f64>,
) -> String {
    let ImageShape {
        height,
        width,
        channels,
    } = shape;
    let cell = (160.0 / height.max(width) as f64).max(4.0);
    let (w, h) = (cell * width as f64, cell * height as f64);
    let mut out = String::new();
    // The input, grey levels of the channel mean.
    let intensity: Vec<f64> = (0..height * width)
        .map(|p| (0..channels).map(|c| pixels[p * channels + c]).sum::<f64>() / channels as f64)
        .collect();
    let (lo, hi) = intensity
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, u), &v| {
            (l.min(v), u.max(v))
        });
    let _ = write!(
        out,
        "<figure><svg viewBox=\"0 0 {w} {h}\" width=\"{w}\" height=\"{h}\" role=\"img\" \
         aria-label=\"input image\">"
    );
    for (p, &value) in intensity.iter().enumerate() {
        let g = if hi > lo {
            (value - lo) / (hi - lo)
        } else {
            0.0
        };
        let level = (255.0 * (1.0 - g)).round() as u8;
        let _ = write!(
            out,
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{cell:.1}\" height=\"{cell:.1}\" \
             fill=\"#{level:02x}{level:02x}{level:02x}\"/>",
            cell * (p % width) as f64,
            cell * (p / width) as f64
        );
    }
    out.push_str("</svg><figcaption>input</figcaption></figure>");
    let f = &r.families;
    let maps = [
        ("deletion", &f.deletion.attribution),
        ("replacement", &f.replacement.attribution),
        ("interpolation", &f.interpolation.attribution),
    ];
    let largest = maps
        .iter()
        .flat_map(|(_, a)| a.iter())
        .fold(0.0_f64, |m, v| m.max(v.abs()))
        .max(1e-300);
    for (name, attribution) in maps {
        let mut owner = vec![None; height * width];
        for g in 0..groups.len() {
            for &i in groups.members(g) {
                owner[i / channels] = Some(g);
            }
        }
        let _ = write!(
            out,
            "<figure><svg viewBox=\"0 0 {w} {h}\" width=\"{w}\" height=\"{h}\" role=\"img\" \
             aria-label=\"{name} attribution\">"
        );
        for (p, o) in owner.iter().enumerate() {
            let colour = match o {
                Some(g) => diverging(attribution[*g] / largest),
                None => "#dddddd".to_string(),
            };
            let _ = write!(
                out,
                "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{cell:.1}\" height=\"{cell:.1}\" \
                 fill=\"{colour}\"/>",
                cell * (p % width) as f64,
                cell * (p / width) as f64
            );
        }
        let _ = write!(out, "</svg><figcaption>{name}</figcaption></figure>");
    }
    out.push_str(
        "<p class=\"small\">Blue: the patch raises the target score; orange: it lowers it; \
         white: no effect. One scale for the three maps.</p>",
    );
    out
}

fn candidate_table(candidates: &[crate::audit::BaselineCandidate]) -> String {
    let mut t = String::from(
        "<table class=\"candidates\"><thead><tr><th>baseline</th><th title=\"p_combined of \
         the baseline\">p</th><th title=\"share of path points off the data\">path off</th>\
         <th title=\"model score at the baseline\">f(x')</th><th title=\"completeness gap\">\
         gap</th><th title=\"Spearman against replacement\">agree</th><th>score</th></tr>\
         </thead><tbody>",
    );
    for (i, c) in candidates.iter().enumerate() {
        let _ = write!(
            t,
            "<tr{}><td>{}{}</td><td>{:.3}</td><td>{:.0}%</td><td>{:.3}</td><td>{:.2e}</td>\
             <td>{:.2}</td><td>{:.2}</td></tr>",
            if i == 0 { " class=\"best\"" } else { "" },
            escape(&c.name),
            if i == 0 { " (used)" } else { "" },
            c.baseline_p,
            100.0 * c.path_off_manifold_rate,
            c.prediction_at_baseline,
            c.completeness_gap,
            c.agreement_with_replacement,
            c.score
        );
    }
    t.push_str("</tbody></table>");
    t
}

const STYLE: &str = "
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:0;color:#1d1d1d;background:#fafaf7}
header,main,footer{max-width:1120px;margin:0 auto;padding:0 20px}
header{padding-top:18px;border-bottom:3px solid #0072B2}
h1{font-size:1.6em;margin:0.3em 0}
h2{font-size:1.3em;margin-top:1.6em;border-bottom:1px solid #ccc}
h3{font-size:1.08em}
h4{font-size:0.95em;margin:0.4em 0;color:#444}
.caution{background:#fff4e0;border-left:4px solid #E69F00;padding:8px 12px}
.settings{color:#555;font-size:0.9em}
.counts .badge{margin-right:8px}
.badge{display:inline-block;padding:1px 8px;border-radius:3px;font-size:0.85em;font-weight:600}
.badge.reliable{background:#d5efe6;color:#00543d;border:1px solid #009E73}
.badge.doubtful{background:#fbeccc;color:#6b4a00;border:1px solid #E69F00}
.badge.unreliable{background:#f6dacb;color:#7a2e00;border:1px solid #D55E00}
table{border-collapse:collapse;font-size:0.88em;margin:6px 0}
th,td{border-bottom:1px solid #ddd;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#eef2f6}
td.reason{max-width:520px}
tr.best td{font-weight:600}
article.row{background:#fff;border:1px solid #ddd;border-radius:4px;padding:4px 16px 12px;margin:14px 0}
.panels{display:flex;flex-wrap:wrap;gap:18px}
.panel{flex:1 1 440px;min-width:300px;overflow-x:auto}
.maps svg{border:1px solid #bbb}
table.candidates td,table.candidates th{padding:2px 5px}
.maps{display:flex;flex-wrap:wrap;gap:12px}
figure{margin:0}
figcaption{font-size:0.8em;text-align:center;color:#444}
.small{font-size:11px;fill:#333;color:#444}
.score{font-weight:400;color:#555;font-size:0.9em}
ul.reasons li{margin-bottom:4px}
footer{margin-top:30px;padding:12px 20px 30px;border-top:1px solid #ccc;color:#444;font-size:0.9em}
";
