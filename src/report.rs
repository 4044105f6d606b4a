//! The analyst's HTML report: one self-contained file (no scripts, no external assets) with
//! charts drawn as inline SVG: ROC curve, precision by week with its interval, referral volume
//! against capacity, PSI per feature, calibration. The markup is well-formed XML (XHTML
//! syntax), so it can be checked mechanically.

use crate::metrics::{self, CalibrationBin, RocPoint};
use crate::monitor::quality::{QualityReport, Z95, wilson};
use crate::service::DriftReport;
use serde::Serialize;
use std::collections::BTreeMap;
use std::fmt::Write;

/// Everything the report shows, gathered by the service.
#[derive(Debug, Clone, Serialize)]
pub struct ReportData {
    pub generated_at: String,
    pub model_version: String,
    pub rules_version: String,
    /// Champion probabilities and labels of adjudicated claims.
    pub scores: Vec<f64>,
    pub labels: Vec<bool>,
    pub quality: QualityReport,
    pub drift: DriftReport,
    /// Reviews a day the referral queues (investigate and desk check) can take.
    pub daily_capacity: f64,
}

pub(crate) fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

const W: f64 = 560.0;
const H: f64 = 300.0;
const L: f64 = 56.0; // left margin
const B: f64 = 40.0; // bottom margin
const T: f64 = 16.0; // top margin
const R: f64 = 16.0; // right margin

struct Frame {
    x0: f64,
    x1: f64,
    y0: f64,
    y1: f64,
}

impl Frame {
    fn x(&self, v: f64) -> f64 {
        L + (v - self.x0) / (self.x1 - self.x0).max(1e-12) * (W - L - R)
    }
    fn y(&self, v: f64) -> f64 {
        H - B - (v - self.y0) / (self.y1 - self.y0).max(1e-12) * (H - B - T)
    }
}

fn svg_open(out: &mut String, title: &str, desc: &str) {
    let _ = write!(
        out,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {H}" width="{W}" height="{H}" role="img" aria-labelledby="t-{id} d-{id}"><title id="t-{id}">{t}</title><desc id="d-{id}">{d}</desc>"#,
        id = title.replace(' ', "-").to_lowercase(),
        t = esc(title),
        d = esc(desc)
    );
}

fn axes(out: &mut String, f: &Frame, xlabel: &str, ylabel: &str, yticks: &[f64]) {
    let _ = write!(
        out,
        r##"<line x1="{L}" y1="{yb}" x2="{xr}" y2="{yb}" stroke="#333"/><line x1="{L}" y1="{T}" x2="{L}" y2="{yb}" stroke="#333"/>"##,
        yb = H - B,
        xr = W - R
    );
    for &t in yticks {
        let y = f.y(t);
        let _ = write!(
            out,
            r##"<line x1="{L}" y1="{y:.1}" x2="{xr}" y2="{y:.1}" stroke="#ddd"/><text x="{tx}" y="{ty:.1}" font-size="11" text-anchor="end">{t}</text>"##,
            xr = W - R,
            tx = L - 6.0,
            ty = y + 4.0
        );
    }
    let _ = write!(
        out,
        r#"<text x="{cx}" y="{by}" font-size="12" text-anchor="middle">{xl}</text><text x="14" y="{cy}" font-size="12" text-anchor="middle" transform="rotate(-90 14 {cy})">{yl}</text>"#,
        cx = (L + W - R) / 2.0,
        by = H - 8.0,
        cy = (T + H - B) / 2.0,
        xl = esc(xlabel),
        yl = esc(ylabel)
    );
}

fn polyline(out: &mut String, f: &Frame, pts: &[(f64, f64)], colour: &str, dash: bool) {
    let p: Vec<String> = pts
        .iter()
        .map(|(x, y)| format!("{:.1},{:.1}", f.x(*x), f.y(*y)))
        .collect();
    let _ = write!(
        out,
        r#"<polyline fill="none" stroke="{colour}" stroke-width="2" {dash} points="{}"/>"#,
        p.join(" "),
        dash = if dash {
            r#"stroke-dasharray="5 4""#
        } else {
            ""
        }
    );
}

fn empty_chart(out: &mut String, title: &str, why: &str) {
    svg_open(out, title, why);
    let _ = write!(
        out,
        r#"<text x="{}" y="{}" font-size="14" text-anchor="middle">{}</text></svg>"#,
        W / 2.0,
        H / 2.0,
        esc(why)
    );
}

/// Axes on the unit square with the diagonal drawn dashed (chance for ROC, perfect for
/// calibration).
fn unit_square(out: &mut String, xlabel: &str, ylabel: &str) -> Frame {
    let f = Frame {
        x0: 0.0,
        x1: 1.0,
        y0: 0.0,
        y1: 1.0,
    };
    axes(out, &f, xlabel, ylabel, &[0.0, 0.5, 1.0]);
    polyline(out, &f, &[(0.0, 0.0), (1.0, 1.0)], "#999", true);
    f
}

fn roc_chart(out: &mut String, curve: &[RocPoint], auc: Option<f64>) {
    let title = "ROC curve";
    if auc.is_none() {
        return empty_chart(out, title, "needs adjudicated claims of both kinds");
    }
    svg_open(
        out,
        title,
        "True positive rate against false positive rate of the champion's probability on adjudicated claims",
    );
    let f = unit_square(out, "false positive rate", "true positive rate");
    let pts: Vec<(f64, f64)> = curve.iter().map(|p| (p.fpr, p.tpr)).collect();
    polyline(out, &f, &pts, "#1b5e7a", false);
    out.push_str("</svg>");
}

fn precision_chart(out: &mut String, weeks: &[(String, u64, u64)]) {
    let title = "Precision by week";
    let rows: Vec<&(String, u64, u64)> = weeks.iter().filter(|w| w.2 > 0).collect();
    if rows.is_empty() {
        return empty_chart(out, title, "no adjudicated referrals yet");
    }
    svg_open(
        out,
        title,
        "Share of adjudicated referrals that were referral-worthy, per ISO week of decision, with 95% Wilson intervals",
    );
    let n = rows.len() as f64;
    let f = Frame {
        x0: -0.5,
        x1: n - 0.5,
        y0: 0.0,
        y1: 1.0,
    };
    axes(
        out,
        &f,
        "week of decision",
        "precision",
        &[0.0, 0.25, 0.5, 0.75, 1.0],
    );
    let mut pts = Vec::new();
    for (i, (week, tp, n_ref)) in rows.iter().enumerate() {
        let x = i as f64;
        let p = *tp as f64 / *n_ref as f64;
        if let Some((lo, hi)) = wilson(*tp, *n_ref, Z95) {
            let _ = write!(
                out,
                r##"<line x1="{x:.1}" y1="{y1:.1}" x2="{x:.1}" y2="{y2:.1}" stroke="#8fb3c4" stroke-width="3"/>"##,
                x = f.x(x),
                y1 = f.y(lo),
                y2 = f.y(hi)
            );
        }
        pts.push((x, p));
        if rows.len() <= 12 || i % (rows.len() / 12 + 1) == 0 {
            let _ = write!(
                out,
                r#"<text x="{:.1}" y="{}" font-size="9" text-anchor="middle">{}</text>"#,
                f.x(x),
                H - B + 14.0,
                esc(week)
            );
        }
    }
    polyline(out, &f, &pts, "#1b5e7a", false);
    for (x, y) in &pts {
        let _ = write!(
            out,
            r##"<circle cx="{:.1}" cy="{:.1}" r="3.5" fill="#1b5e7a"/>"##,
            f.x(*x),
            f.y(*y)
        );
    }
    out.push_str("</svg>");
}

fn volume_chart(out: &mut String, weeks: &[(String, u64)], weekly_capacity: f64) {
    let title = "Referrals against capacity";
    if weeks.is_empty() {
        return empty_chart(out, title, "no decisions yet");
    }
    svg_open(
        out,
        title,
        "Claims referred (investigate and desk check) per week of decision, with the weekly review capacity as a dashed line",
    );
    let top = weeks
        .iter()
        .map(|w| w.1 as f64)
        .fold(weekly_capacity, f64::max)
        * 1.1;
    let n = weeks.len() as f64;
    let f = Frame {
        x0: -0.5,
        x1: n - 0.5,
        y0: 0.0,
        y1: top.max(1.0),
    };
    let ticks: Vec<f64> = (0..=4)
        .map(|i| (top / 4.0 * f64::from(i)).round())
        .collect();
    axes(out, &f, "week of decision", "referrals", &ticks);
    let bw = ((W - L - R) / n * 0.7).max(1.0);
    for (i, (_, v)) in weeks.iter().enumerate() {
        let x = f.x(i as f64) - bw / 2.0;
        let y = f.y(*v as f64);
        let _ = write!(
            out,
            r##"<rect x="{x:.1}" y="{y:.1}" width="{bw:.1}" height="{h:.1}" fill="#1b5e7a"/>"##,
            h = (H - B - y).max(0.0)
        );
    }
    polyline(
        out,
        &f,
        &[(-0.5, weekly_capacity), (n - 0.5, weekly_capacity)],
        "#b8520f",
        true,
    );
    out.push_str("</svg>");
}

fn psi_chart(out: &mut String, drift: &DriftReport) {
    let title = "PSI per feature";
    let rows: Vec<(&str, f64)> = drift
        .features
        .iter()
        .chain(&drift.scores)
        .map(|r| (r.name.as_str(), r.psi))
        .collect();
    if rows.is_empty() {
        return empty_chart(out, title, "no claims in the drift window");
    }
    let row_h = 16.0;
    let h = T + B + row_h * rows.len() as f64;
    let left = 230.0;
    let top = rows.iter().map(|r| r.1).fold(0.3, f64::max) * 1.05;
    let sx = |v: f64| left + v / top * (W - left - R);
    let _ = write!(
        out,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {h}" width="{W}" height="{h}" role="img" aria-labelledby="t-psi d-psi"><title id="t-psi">{title}</title><desc id="d-psi">Population stability index of each model feature and score, recent claims against training; lines at 0.1 (watch) and 0.25 (shifted), a rule of thumb</desc>"#
    );
    for (i, (name, psi)) in rows.iter().enumerate() {
        let y = T + row_h * i as f64;
        let colour = if *psi > 0.25 {
            "#b8520f"
        } else if *psi >= 0.1 {
            "#c99a06"
        } else {
            "#1b5e7a"
        };
        let _ = write!(
            out,
            r#"<text x="{tx}" y="{ty:.1}" font-size="11" text-anchor="end">{n}</text><rect x="{left}" y="{y:.1}" width="{w:.1}" height="{bh}" fill="{colour}"/><text x="{vx:.1}" y="{ty:.1}" font-size="10">{psi:.3}</text>"#,
            tx = left - 6.0,
            ty = y + 11.0,
            n = esc(name),
            w = (sx(*psi) - left).max(0.5),
            bh = row_h - 4.0,
            vx = sx(*psi) + 4.0
        );
    }
    let bottom = T + row_h * rows.len() as f64;
    for (v, label) in [(0.1, "0.1 watch"), (0.25, "0.25 shifted")] {
        let _ = write!(
            out,
            r##"<line x1="{x:.1}" y1="{T}" x2="{x:.1}" y2="{bottom:.1}" stroke="#555" stroke-dasharray="4 3"/><text x="{x:.1}" y="{ly:.1}" font-size="10" text-anchor="middle">{label}</text>"##,
            x = sx(v),
            ly = bottom + 14.0
        );
    }
    out.push_str("</svg>");
}

fn calibration_chart(out: &mut String, bins: &[CalibrationBin]) {
    let title = "Calibration";
    if bins.is_empty() {
        return empty_chart(out, title, "no adjudicated claims yet");
    }
    svg_open(
        out,
        title,
        "Observed rate of referral-worthy claims against mean predicted probability, in ten bands of probability; the diagonal is perfect calibration",
    );
    let f = unit_square(out, "mean predicted probability", "observed rate");
    let pts: Vec<(f64, f64)> = bins
        .iter()
        .map(|b| (b.mean_predicted, b.observed_rate))
        .collect();
    polyline(out, &f, &pts, "#1b5e7a", false);
    for b in bins {
        let _ = write!(
            out,
            r##"<circle cx="{:.1}" cy="{:.1}" r="{:.1}" fill="#1b5e7a"><title>{} claims</title></circle>"##,
            f.x(b.mean_predicted),
            f.y(b.observed_rate),
            (b.count as f64).log10().max(0.5) + 2.0,
            b.count
        );
    }
    out.push_str("</svg>");
}

fn pct(x: Option<f64>) -> String {
    x.map_or("not yet measurable".into(), |v| {
        format!("{:.1}%", v * 100.0)
    })
}

/// The report as one HTML document.
pub fn render(d: &ReportData) -> String {
    let mut out = String::new();
    out.push_str("<!DOCTYPE html>\n<html xmlns=\"http://www.w3.org/1999/xhtml\" lang=\"en\"><head><meta charset=\"utf-8\"/><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/><title>weir monitoring report</title><style>body{font-family:system-ui,sans-serif;max-width:1200px;margin:1.5rem auto;padding:0 1rem;color:#1d1d1d;background:#fbfaf7}h1{font-size:1.5rem}h2{font-size:1.1rem;margin-top:0}.caution{border-left:4px solid #b8520f;background:#fff4ea;padding:.6rem 1rem}.grid{display:grid;grid-template-columns:repeat(auto-fit,minmax(560px,1fr));gap:1.2rem}figure{margin:0;background:#fff;border:1px solid #ddd;padding:.8rem}svg{max-width:100%;height:auto}table{border-collapse:collapse}td,th{padding:.2rem .6rem;border-bottom:1px solid #ddd;text-align:left}</style></head><body>");
    out.push_str("<h1>weir monitoring report</h1><p class=\"caution\">A referral is a prompt for human review, not a finding of fraud. Payment decisions follow the insurer's own procedures, fair claims handling rules and the law where it operates.</p>");
    out.push_str(&render_body(d));
    out.push_str("</body></html>\n");
    out
}

/// The report's summary table, charts and notes, as an HTML fragment (the web monitoring page
/// shows the same).
pub fn render_body(d: &ReportData) -> String {
    let auc = metrics::roc_auc(&d.scores, &d.labels);
    let curve = metrics::roc_curve(&d.scores, &d.labels);
    let calib = metrics::calibration_table(&d.scores, &d.labels, 10);
    let mut weeks: BTreeMap<String, (u64, u64, u64)> = BTreeMap::new();
    for g in &d.quality.groups {
        let e = weeks.entry(g.week.clone()).or_default();
        e.0 += g.confusion.tp;
        e.1 += g.confusion.tp + g.confusion.fp;
        if matches!(
            g.queue,
            crate::rules::Queue::Investigate | crate::rules::Queue::DeskCheck
        ) {
            e.2 += g.decided;
        }
    }
    let prec: Vec<(String, u64, u64)> = weeks.iter().map(|(w, v)| (w.clone(), v.0, v.1)).collect();
    let vol: Vec<(String, u64)> = weeks.iter().map(|(w, v)| (w.clone(), v.2)).collect();

    let mut out = String::new();
    let _ = write!(
        out,
        "<table><tr><th>generated</th><td>{}</td></tr><tr><th>champion model</th><td>{}</td></tr><tr><th>rules</th><td>{}</td></tr><tr><th>adjudicated claims</th><td>{} ({} referral-worthy)</td></tr><tr><th>ROC AUC on adjudicated claims</th><td>{}</td></tr><tr><th>precision of referrals</th><td>{} (95% Wilson interval {})</td></tr><tr><th>referrals awaiting an outcome</th><td>{}</td></tr><tr><th>recall (audit sample)</th><td>{} (95% interval from the audit sample {})</td></tr></table><p>{}</p>",
        esc(&d.generated_at),
        esc(&d.model_version),
        esc(&d.rules_version),
        d.labels.len(),
        d.labels.iter().filter(|&&y| y).count(),
        auc.map_or("needs both kinds of outcome".into(), |a| format!("{a:.3}")),
        pct(d.quality.precision.precision),
        d.quality
            .precision
            .interval
            .map_or("-".into(), |(l, h)| format!(
                "{:.1}% to {:.1}%",
                l * 100.0,
                h * 100.0
            )),
        pct(d.quality.share_awaiting_outcome),
        pct(d.quality.audit.recall),
        d.quality
            .audit
            .recall_interval
            .map_or("-".into(), |(l, h)| format!(
                "{:.1}% to {:.1}%",
                l * 100.0,
                h * 100.0
            )),
        esc(&d.quality.audit.note),
    );
    out.push_str("<div class=\"grid\">");
    let section = |out: &mut String, h: &str| {
        let _ = write!(out, "<figure><h2>{}</h2>", esc(h));
    };
    section(&mut out, "ROC curve");
    roc_chart(&mut out, &curve, auc);
    out.push_str("</figure>");
    section(&mut out, "Precision by week");
    precision_chart(&mut out, &prec);
    out.push_str("</figure>");
    section(&mut out, "Referrals against capacity");
    volume_chart(&mut out, &vol, d.daily_capacity * 7.0);
    out.push_str("</figure>");
    section(&mut out, "PSI per feature");
    psi_chart(&mut out, &d.drift);
    out.push_str("</figure>");
    section(&mut out, "Calibration");
    calibration_chart(&mut out, &calib);
    out.push_str("</figure>");
    let _ = writeln!(
        out,
        "</div><p>PSI reading bands: {}. Drift window: claims decided in the last {} days ({} claims).</p>",
        esc(&d.drift.bands),
        d.drift.window_days,
        d.drift.claims_in_window
    );
    out
}
