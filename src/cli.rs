//! File readers behind the analyst commands (`evaluate`, `drift`). Every problem names the file,
//! the line and the column; nothing panics on a malformed file.

use crate::metrics::{self, Evaluation};
use crate::monitor::drift::{self, Drift};
use anyhow::{Context, Result, anyhow, bail};
use std::path::Path;

fn reader(path: &Path) -> Result<csv::Reader<std::fs::File>> {
    csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_path(path)
        .with_context(|| format!("cannot open {}", path.display()))
}

fn column(headers: &csv::StringRecord, name: &str, path: &Path) -> Result<usize> {
    headers.iter().position(|h| h == name).ok_or_else(|| {
        anyhow!(
            "{}: no column {name:?} in the header (columns: {})",
            path.display(),
            headers.iter().collect::<Vec<_>>().join(", ")
        )
    })
}

/// Read a `score,label` file: score a finite number, label 0 or 1.
pub fn read_scores(path: &Path) -> Result<(Vec<f64>, Vec<bool>)> {
    let mut r = reader(path)?;
    let headers = r
        .headers()
        .with_context(|| format!("{}: header", path.display()))?
        .clone();
    let si = column(&headers, "score", path)?;
    let li = column(&headers, "label", path)?;
    let (mut scores, mut labels) = (Vec::new(), Vec::new());
    for (i, rec) in r.records().enumerate() {
        let line = i + 2;
        let rec = rec.with_context(|| format!("{}: line {line}", path.display()))?;
        let s = rec.get(si).unwrap_or("");
        let score: f64 = s
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite())
            .ok_or_else(|| {
                anyhow!(
                    "{}: line {line}, column score: {s:?} is not a finite number",
                    path.display()
                )
            })?;
        let label = match rec.get(li).unwrap_or("") {
            "1" => true,
            "0" => false,
            other => bail!(
                "{}: line {line}, column label: {other:?} is not 0 or 1",
                path.display()
            ),
        };
        scores.push(score);
        labels.push(label);
    }
    if scores.is_empty() {
        bail!("{}: no rows", path.display());
    }
    Ok((scores, labels))
}

/// `weir evaluate`: default k is the number of positives (precision at k is then also recall
/// at k, the "R-precision").
pub fn evaluate_file(path: &Path, threshold: f64, top_k: Option<usize>) -> Result<Evaluation> {
    let (scores, labels) = read_scores(path)?;
    let k = top_k.unwrap_or_else(|| labels.iter().filter(|&&y| y).count());
    Ok(metrics::evaluate(&scores, &labels, threshold, k))
}

/// One column of a CSV file as text.
pub fn read_column(path: &Path, name: &str) -> Result<Vec<String>> {
    let mut r = reader(path)?;
    let headers = r
        .headers()
        .with_context(|| format!("{}: header", path.display()))?
        .clone();
    let ci = column(&headers, name, path)?;
    let mut out = Vec::new();
    for (i, rec) in r.records().enumerate() {
        let rec = rec.with_context(|| format!("{}: line {}", path.display(), i + 2))?;
        out.push(rec.get(ci).unwrap_or("").to_string());
    }
    if out.is_empty() {
        bail!("{}: column {name:?} has no rows", path.display());
    }
    Ok(out)
}

fn all_numeric(v: &[String]) -> Option<Vec<f64>> {
    v.iter()
        .map(|s| s.parse::<f64>().ok().filter(|x| x.is_finite()))
        .collect()
}

/// `weir drift`: numeric when every value of both extracts is a finite number, otherwise
/// compared category by category.
pub fn drift_files(baseline: &Path, current: &Path, name: &str, bins: usize) -> Result<Drift> {
    if bins < 2 {
        bail!("--bins must be at least 2");
    }
    let b = read_column(baseline, name)?;
    let c = read_column(current, name)?;
    Ok(match (all_numeric(&b), all_numeric(&c)) {
        (Some(bn), Some(cn)) => drift::numeric(&bn, &cn, bins),
        _ => drift::categorical(&b, &c),
    })
}
