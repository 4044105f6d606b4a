//! Server-rendered drawings of a component of the claims graph: the network (claims and the
//! parties that tie them, laid out by a seeded force-directed layout) and the timeline.
//!
//! Pure: a component and what the page knows of each claim in, SVG text out. The layout is
//! Fruchterman and Reingold's (1991) spring embedder, started from a fixed seed, so the same
//! component is always drawn the same way. Claims are boxes and parties are ellipses, each
//! labelled, so they are told apart without colour.

use crate::graph::{self, Component};
use rand::{Rng, SeedableRng};
use std::collections::{HashMap, VecDeque};
use std::fmt::Write as _;

/// Most nodes drawn; a larger component is summarised around the claim in focus.
pub const MAX_NODES: usize = 40;
const WIDTH: f64 = 1100.0;
const BOX_W: f64 = 150.0;
const BOX_H: f64 = 48.0;
const PARTY_W: f64 = 150.0;
/// Space kept between any two drawn nodes, in pixels.
const GAP: f64 = 10.0;
const SEED: u64 = 0x7765_6972_6472_6177;

/// What a drawing says of one claim.
pub struct ClaimFacts {
    pub amount: String,
    pub date: String,
    /// "investigate", "no review", ...
    pub queue: String,
    /// "confirmed fraud", "genuine", or empty while open.
    pub outcome: String,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

enum Node {
    Claim(usize),
    /// Parties tying exactly the same claims, drawn as one ellipse (a claimant, their policy
    /// and their account tie the same two claims: three ellipses would say one thing thrice).
    Parties(Vec<usize>),
}

/// Lines of a party node's label, at most three parties named.
fn party_lines(c: &Component, ts: &[usize]) -> Vec<String> {
    let mut lines: Vec<String> = ts
        .iter()
        .take(3)
        .map(|&t| graph::party_words(&c.ties[t].key))
        .collect();
    if ts.len() > 3 {
        lines.push(format!("and {} more", ts.len() - 3));
    }
    lines
}

/// Half width and half height of a node, in pixels.
fn half_size(n: &Node, c: &Component) -> (f64, f64) {
    match n {
        Node::Claim(_) => (BOX_W / 2.0, BOX_H / 2.0),
        Node::Parties(ts) => (PARTY_W / 2.0, 10.0 + 6.5 * party_lines(c, ts).len() as f64),
    }
}

/// Push overlapping nodes apart (along the axis where they overlap least) until none
/// overlaps or the passes run out; positions stay inside the canvas.
fn separate(pos: &mut [(f64, f64)], half: &[(f64, f64)], w: f64, h: f64) {
    let n = pos.len();
    for _ in 0..300 {
        let mut moved = false;
        for i in 0..n {
            for j in i + 1..n {
                let (dx, dy) = (pos[j].0 - pos[i].0, pos[j].1 - pos[i].1);
                let ox = half[i].0 + half[j].0 + GAP - dx.abs();
                let oy = half[i].1 + half[j].1 + GAP - dy.abs();
                if ox <= 0.0 || oy <= 0.0 {
                    continue;
                }
                moved = true;
                // Ties (the same spot) part by index, so the result stays deterministic.
                let sign = |d: f64| {
                    if d > 0.0 || (d == 0.0 && i < j) {
                        1.0
                    } else {
                        -1.0
                    }
                };
                if ox < oy {
                    let m = ox / 2.0 + 0.5;
                    pos[i].0 -= sign(dx) * m;
                    pos[j].0 += sign(dx) * m;
                } else {
                    let m = oy / 2.0 + 0.5;
                    pos[i].1 -= sign(dy) * m;
                    pos[j].1 += sign(dy) * m;
                }
            }
        }
        for (p, hs) in pos.iter_mut().zip(half) {
            p.0 = p.0.clamp(hs.0 + 4.0, w - hs.0 - 4.0);
            p.1 = p.1.clamp(hs.1 + 4.0, h - hs.1 - 4.0);
        }
        if !moved {
            break;
        }
    }
}

/// Which nodes to draw: all of them up to [`MAX_NODES`], else the nearest to `focus` (by
/// breadth-first order through the ties). Returns (claims, ties) indices.
fn pick(c: &Component, focus: u64) -> (Vec<usize>, Vec<usize>) {
    let total = c.members.len() + c.ties.len();
    if total <= MAX_NODES {
        return ((0..c.members.len()).collect(), (0..c.ties.len()).collect());
    }
    let claim_index: HashMap<u64, usize> = c
        .members
        .iter()
        .enumerate()
        .map(|(i, m)| (m.claim, i))
        .collect();
    let mut ties_of: Vec<Vec<usize>> = vec![Vec::new(); c.members.len()];
    for (t, tie) in c.ties.iter().enumerate() {
        for h in &tie.claims {
            ties_of[claim_index[h]].push(t);
        }
    }
    let start = claim_index.get(&focus).copied().unwrap_or(0);
    let (mut claims, mut ties) = (vec![start], Vec::new());
    let (mut seen_c, mut seen_t) = (vec![false; c.members.len()], vec![false; c.ties.len()]);
    seen_c[start] = true;
    let mut queue = VecDeque::from([start]);
    'walk: while let Some(ci) = queue.pop_front() {
        for &t in &ties_of[ci] {
            if seen_t[t] {
                continue;
            }
            if claims.len() + ties.len() >= MAX_NODES {
                break 'walk;
            }
            seen_t[t] = true;
            ties.push(t);
            for h in &c.ties[t].claims {
                let j = claim_index[h];
                if !seen_c[j] {
                    if claims.len() + ties.len() >= MAX_NODES {
                        break 'walk;
                    }
                    seen_c[j] = true;
                    claims.push(j);
                    queue.push_back(j);
                }
            }
        }
    }
    claims.sort_unstable();
    ties.sort_unstable();
    (claims, ties)
}

/// Fruchterman–Reingold positions in `[0, 1]²` for `n` nodes and `edges`, from a fixed seed.
pub fn layout(n: usize, edges: &[(usize, usize)]) -> Vec<(f64, f64)> {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(SEED);
    let mut pos: Vec<(f64, f64)> = (0..n)
        .map(|_| (rng.r#gen::<f64>(), rng.r#gen::<f64>()))
        .collect();
    if n <= 1 {
        return vec![(0.5, 0.5); n];
    }
    let k = (1.0 / n as f64).sqrt() * 0.9;
    let iterations = 400;
    for it in 0..iterations {
        let temp = 0.1 * (1.0 - it as f64 / iterations as f64) + 0.002;
        let mut disp = vec![(0.0f64, 0.0f64); n];
        for i in 0..n {
            for j in i + 1..n {
                let (dx, dy) = (pos[i].0 - pos[j].0, pos[i].1 - pos[j].1);
                let d = (dx * dx + dy * dy).sqrt().max(1e-6);
                let f = k * k / d;
                disp[i].0 += dx / d * f;
                disp[i].1 += dy / d * f;
                disp[j].0 -= dx / d * f;
                disp[j].1 -= dy / d * f;
            }
        }
        for &(a, b) in edges {
            let (dx, dy) = (pos[a].0 - pos[b].0, pos[a].1 - pos[b].1);
            let d = (dx * dx + dy * dy).sqrt().max(1e-6);
            let f = d * d / k;
            disp[a].0 -= dx / d * f;
            disp[a].1 -= dy / d * f;
            disp[b].0 += dx / d * f;
            disp[b].1 += dy / d * f;
        }
        for i in 0..n {
            let (dx, dy) = disp[i];
            let d = (dx * dx + dy * dy).sqrt().max(1e-9);
            let step = d.min(temp);
            pos[i].0 = (pos[i].0 + dx / d * step).clamp(0.0, 1.0);
            pos[i].1 = (pos[i].1 + dy / d * step).clamp(0.0, 1.0);
        }
    }
    // Stretch to fill the square.
    let (minx, maxx) = pos
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), p| (a.min(p.0), b.max(p.0)));
    let (miny, maxy) = pos
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), p| (a.min(p.1), b.max(p.1)));
    let sx = (maxx - minx).max(1e-9);
    let sy = (maxy - miny).max(1e-9);
    pos.iter()
        .map(|p| ((p.0 - minx) / sx, (p.1 - miny) / sy))
        .collect()
}

/// The component as a network drawing. `focus` is the claim a large component is summarised
/// around, drawn with a double border when `mark_focus` (the page is about it); `facts` what
/// to print in each claim's box, `link` the page of a claim.
pub fn network_svg(
    c: &Component,
    focus: u64,
    mark_focus: bool,
    facts: &dyn Fn(&graph::ClaimNode) -> ClaimFacts,
    link: &dyn Fn(&str) -> String,
) -> String {
    let (claims, ties) = pick(c, focus);
    let mut nodes: Vec<Node> = claims.iter().map(|&i| Node::Claim(i)).collect();
    let claim_pos: HashMap<u64, usize> = claims
        .iter()
        .enumerate()
        .map(|(k, &i)| (c.members[i].claim, k))
        .collect();
    // Group ties by the drawn claims they tie.
    let mut groups: Vec<(Vec<usize>, Vec<usize>)> = Vec::new();
    for &t in &ties {
        let mut tied: Vec<usize> = c.ties[t]
            .claims
            .iter()
            .filter_map(|h| claim_pos.get(h).copied())
            .collect();
        tied.sort_unstable();
        match groups.iter_mut().find(|g| g.0 == tied) {
            Some(g) => g.1.push(t),
            None => groups.push((tied, vec![t])),
        }
    }
    let mut edges = Vec::new();
    for (tied, ts) in groups {
        let k = nodes.len();
        for ci in tied {
            edges.push((ci, k));
        }
        nodes.push(Node::Parties(ts));
    }
    let height = (420.0 + 11.0 * nodes.len() as f64).clamp(420.0, 900.0);
    let half: Vec<(f64, f64)> = nodes.iter().map(|n| half_size(n, c)).collect();
    let unit = layout(nodes.len(), &edges);
    let (mx, my) = (PARTY_W / 2.0 + 8.0, 40.0);
    let mut pos: Vec<(f64, f64)> = unit
        .iter()
        .map(|p| {
            (
                mx + p.0 * (WIDTH - 2.0 * mx),
                my + p.1 * (height - 2.0 * my),
            )
        })
        .collect();
    separate(&mut pos, &half, WIDTH, height);
    let at = |i: usize| pos[i];
    let shown = claims.len() + ties.len();
    let total = c.members.len() + c.ties.len();
    let mut s = String::new();
    let _ = write!(
        s,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height:.0}\" role=\"img\" aria-labelledby=\"net-title net-desc\" class=\"network\"><title id=\"net-title\">Claims graph component {}</title><desc id=\"net-desc\">{} claims (boxes) and {} parties (ellipses) that tie them{}.</desc>",
        esc(&c.id),
        c.members.len(),
        c.ties.len(),
        if shown < total {
            format!("; the {shown} nodes nearest the claim in focus are drawn")
        } else {
            String::new()
        }
    );
    s.push_str("<rect x=\"0\" y=\"0\" width=\"100%\" height=\"100%\" fill=\"#fbfaf6\"/>");
    for &(a, b) in &edges {
        let (x1, y1) = at(a);
        let (x2, y2) = at(b);
        let _ = write!(
            s,
            "<line x1=\"{x1:.1}\" y1=\"{y1:.1}\" x2=\"{x2:.1}\" y2=\"{y2:.1}\" stroke=\"#8d877a\" stroke-width=\"1.4\"/>"
        );
    }
    for (i, n) in nodes.iter().enumerate() {
        let (x, y) = at(i);
        match n {
            Node::Parties(ts) => {
                let lines = party_lines(c, ts);
                let (hw, hh) = half[i];
                let _ = write!(
                    s,
                    "<g><ellipse cx=\"{x:.1}\" cy=\"{y:.1}\" rx=\"{hw:.1}\" ry=\"{hh:.1}\" fill=\"#e6eef0\" stroke=\"#24403f\" stroke-width=\"1.5\"/>"
                );
                let top = y - 6.5 * (lines.len() as f64 - 1.0) + 4.0;
                for (l, text) in lines.iter().enumerate() {
                    let _ = write!(
                        s,
                        "<text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"11\" fill=\"#1b2424\">{}</text>",
                        top + 13.0 * l as f64,
                        esc(text)
                    );
                }
                s.push_str("</g>");
            }
            Node::Claim(ci) => {
                let m = &c.members[*ci];
                let f = facts(m);
                let confirmed = f.outcome == "confirmed fraud";
                let (fill, stroke, width) = match (confirmed, f.queue.as_str()) {
                    (true, _) => ("#f4d6cf", "#8a1c12", 3.0),
                    (_, "investigate") => ("#fbe3cf", "#8a3b12", 2.0),
                    (_, "desk check") => ("#fdf0da", "#8a5d12", 1.6),
                    _ => ("#ffffff", "#55524b", 1.2),
                };
                let (bx, by) = (x - BOX_W / 2.0, y - BOX_H / 2.0);
                let _ = write!(s, "<a href=\"{}\"><g>", esc(&link(&m.claim_id)));
                if mark_focus && m.claim == focus {
                    let _ = write!(
                        s,
                        "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{}\" height=\"{}\" rx=\"4\" fill=\"none\" stroke=\"#1b2424\" stroke-width=\"1.5\"/>",
                        bx - 4.0,
                        by - 4.0,
                        BOX_W + 8.0,
                        BOX_H + 8.0
                    );
                }
                let status = if f.outcome.is_empty() {
                    f.queue.clone()
                } else {
                    f.outcome.clone()
                };
                let _ = write!(
                    s,
                    "<rect x=\"{bx:.1}\" y=\"{by:.1}\" width=\"{BOX_W}\" height=\"{BOX_H}\" rx=\"3\" fill=\"{fill}\" stroke=\"{stroke}\" stroke-width=\"{width}\"/><text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"11.5\" font-weight=\"700\" fill=\"#1b2424\">{}</text><text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"10\" fill=\"#1b2424\">{} · {}</text><text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"10\" fill=\"#1b2424\" font-style=\"italic\">{}</text></g></a>",
                    by + 14.0,
                    esc(&m.claim_id),
                    by + 28.0,
                    esc(&f.date),
                    esc(&f.amount),
                    by + 41.0,
                    esc(&status)
                );
            }
        }
    }
    s.push_str("</svg>");
    s
}

/// The component's claims on a time line: one mark per claim at its report date, the claim
/// in focus and confirmed frauds marked in words beside the mark.
pub fn timeline_svg(
    c: &Component,
    focus: u64,
    facts: &dyn Fn(&graph::ClaimNode) -> ClaimFacts,
) -> String {
    let w = WIDTH;
    let rows = c.members.len().min(60);
    let h = 46.0 + 16.0 * rows as f64;
    let (first, last) = (
        c.members.first().map_or(0, |m| m.at),
        c.members.last().map_or(0, |m| m.at),
    );
    let span = (last - first).max(86_400) as f64;
    let (left, right) = (150.0, w - 30.0);
    let x_of = |at: i64| left + (at - first) as f64 / span * (right - left);
    let day = |at: i64| {
        chrono::DateTime::from_timestamp(at, 0)
            .map(|d| d.format("%Y-%m-%d").to_string())
            .unwrap_or_default()
    };
    let mut s = String::new();
    let _ = write!(
        s,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {w} {h}\" role=\"img\" aria-labelledby=\"tl-title\" class=\"timeline\"><title id=\"tl-title\">{} claims from {} to {}, one row each in report order</title><rect width=\"100%\" height=\"100%\" fill=\"#fbfaf6\"/>",
        c.members.len(),
        day(first),
        day(last)
    );
    let _ = write!(
        s,
        "<text x=\"{left}\" y=\"16\" font-size=\"11\" fill=\"#1b2424\">{}</text><text x=\"{right}\" y=\"16\" font-size=\"11\" text-anchor=\"end\" fill=\"#1b2424\">{}</text><line x1=\"{left}\" y1=\"24\" x2=\"{right}\" y2=\"24\" stroke=\"#55524b\"/>",
        day(first),
        day(last)
    );
    for (r, m) in c.members.iter().take(rows).enumerate() {
        let y = 40.0 + 16.0 * r as f64;
        let x = x_of(m.at);
        let f = facts(m);
        let mut note = f.outcome.clone();
        if note.is_empty() {
            note = f.queue.clone();
        }
        if m.claim == focus {
            note = format!("this claim · {note}");
        }
        let weight = if m.claim == focus { "700" } else { "400" };
        let _ = write!(
            s,
            "<line x1=\"{left}\" y1=\"{y:.1}\" x2=\"{right}\" y2=\"{y:.1}\" stroke=\"#e3dfd4\"/><text x=\"8\" y=\"{:.1}\" font-size=\"11\" font-weight=\"{weight}\" fill=\"#1b2424\">{}</text><rect x=\"{:.1}\" y=\"{:.1}\" width=\"8\" height=\"8\" fill=\"#24403f\"/><text x=\"{:.1}\" y=\"{:.1}\" font-size=\"10\" fill=\"#1b2424\" text-anchor=\"{}\">{} · {} · {}</text>",
            y + 4.0,
            esc(&m.claim_id),
            x - 4.0,
            y - 4.0,
            if x > (left + right) / 2.0 {
                x - 8.0
            } else {
                x + 8.0
            },
            y + 4.0,
            if x > (left + right) / 2.0 {
                "end"
            } else {
                "start"
            },
            esc(&f.date),
            esc(&f.amount),
            esc(&note)
        );
    }
    if c.members.len() > rows {
        let _ = write!(
            s,
            "<text x=\"8\" y=\"{:.1}\" font-size=\"11\">and {} later claims (listed below)</text>",
            h - 4.0,
            c.members.len() - rows
        );
    }
    s.push_str("</svg>");
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::graph::{ClaimNode, Tie};

    fn component(n: usize) -> Component {
        let members: Vec<ClaimNode> = (0..n)
            .map(|i| ClaimNode {
                claim: i as u64 + 1,
                claim_id: format!("C-{i}"),
                at: 1_700_000_000 + i as i64 * 86_400,
                claimant: i as u64,
                amount: 100.0,
                keys: vec![],
            })
            .collect();
        let ties = (0..n.saturating_sub(1))
            .map(|i| Tie {
                key: format!("witness:W-{i}"),
                claims: vec![i as u64 + 1, i as u64 + 2],
            })
            .collect();
        Component {
            id: "G-1".into(),
            members,
            ties,
            hubs: vec![],
            truncated: false,
            from: 0,
            to: i64::MAX,
        }
    }

    fn facts(_: &ClaimNode) -> ClaimFacts {
        ClaimFacts {
            amount: "EUR 100.00".into(),
            date: "2025-01-01".into(),
            queue: "investigate".into(),
            outcome: String::new(),
        }
    }

    #[test]
    fn the_layout_is_deterministic_and_inside_the_square() {
        let edges = [(0, 1), (1, 2), (2, 3), (3, 0), (4, 0)];
        let a = layout(5, &edges);
        assert_eq!(a, layout(5, &edges));
        assert!(
            a.iter()
                .all(|p| (0.0..=1.0).contains(&p.0) && (0.0..=1.0).contains(&p.1))
        );
        // Spread out: no two nodes on top of each other.
        for i in 0..5 {
            for j in i + 1..5 {
                let d = ((a[i].0 - a[j].0).powi(2) + (a[i].1 - a[j].1).powi(2)).sqrt();
                assert!(d > 0.05, "{i} and {j} overlap: {a:?}");
            }
        }
    }

    #[test]
    fn a_large_component_is_summarised_around_the_focus() {
        let c = component(60); // 60 claims and 59 ties: 119 nodes
        let svg = network_svg(&c, 31, true, &facts, &|id| format!("/ui/claims/{id}"));
        let boxes = svg.matches("<rect x=").count() - 1; // less the background
        let ellipses = svg.matches("<ellipse").count();
        assert!(boxes + ellipses <= MAX_NODES + 1, "{boxes} + {ellipses}");
        assert!(svg.contains("C-30"), "the focus is drawn");
        assert!(svg.contains("nearest the claim in focus"));
        let small = network_svg(&component(5), 1, true, &facts, &|id| id.to_string());
        assert_eq!(small.matches("<ellipse").count(), 4);
        assert!(!small.contains("nearest"));
        assert_eq!(
            small,
            network_svg(&component(5), 1, true, &facts, &|id| id.to_string())
        );
    }
}
