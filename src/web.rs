//! Server-rendered pages for investigators and analysts: sign in with an API key, work a
//! queue, read a claim and record its outcome, read the monitoring numbers. Plain HTML forms,
//! no JavaScript; charts are the report's server-side SVG.
//!
//! Sign-in turns a key into a session: a random 256-bit id in an `HttpOnly`, `SameSite=Strict`
//! cookie scoped to `/ui`, held in memory for eight hours (a restart signs everyone out). Every
//! form carries the session's own token as well, so a form posted from another site fails
//! even where the cookie would be sent. Pages check the same roles as the API.

use crate::access::{Principal, Role};
use crate::feedback::Outcome;
use crate::http::{AppState, check_id, queue_param};
use crate::report::esc;
use crate::rules::Queue;
use axum::Form;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::{get, post};
use std::collections::HashMap;
use std::fmt::Write;
use std::sync::Mutex;
use std::time::{Duration, Instant};

const COOKIE: &str = "weir_session";
const SESSION_LIFETIME: Duration = Duration::from_secs(8 * 3600);

struct Session {
    principal: Principal,
    csrf: String,
    expires: Instant,
}

/// Signed-in browsers, by session id.
#[derive(Default)]
pub struct Sessions {
    map: Mutex<HashMap<String, Session>>,
}

fn random_token() -> String {
    use rand::RngCore;
    let mut b = [0u8; 32];
    rand::rngs::OsRng.fill_bytes(&mut b);
    b.iter().map(|x| format!("{x:02x}")).collect()
}

impl Sessions {
    fn start(&self, principal: Principal) -> (String, String) {
        let (id, csrf) = (random_token(), random_token());
        if let Ok(mut m) = self.map.lock() {
            let now = Instant::now();
            m.retain(|_, s| s.expires > now);
            m.insert(
                id.clone(),
                Session {
                    principal,
                    csrf: csrf.clone(),
                    expires: now + SESSION_LIFETIME,
                },
            );
        }
        (id, csrf)
    }

    fn get(&self, id: &str) -> Option<(Principal, String)> {
        let m = self.map.lock().ok()?;
        m.get(id)
            .filter(|s| s.expires > Instant::now())
            .map(|s| (s.principal.clone(), s.csrf.clone()))
    }

    fn end(&self, id: &str) {
        if let Ok(mut m) = self.map.lock() {
            m.remove(id);
        }
    }
}

pub(crate) fn routes() -> axum::Router<AppState> {
    axum::Router::new()
        .route("/ui", get(|| async { Redirect::to("/ui/queues") }))
        .route("/ui/login", get(login_page).post(login))
        .route("/ui/logout", post(logout))
        .route("/ui/queues", get(queues_page))
        .route("/ui/queues/{queue}/lease", post(lease_next))
        .route("/ui/claims/{claim_id}", get(claim_page))
        .route("/ui/claims/{claim_id}/outcome", post(post_outcome))
        .route("/ui/monitoring", get(monitoring_page))
        .route("/ui/rings", get(rings_page))
        .route("/ui/rings/{ring_id}", get(ring_page))
        .route("/ui/rings/{ring_id}/graphml", get(ring_graphml))
}

const STYLE: &str = "
:root{--ink:#1b2424;--paper:#f7f5ef;--card:#ffffff;--rule:#c9c4b8;--band:#24403f;--accent:#8a3b12;--ok:#1d5e3a;--link:#1c4f8a}
*{box-sizing:border-box}
body{margin:0;font:16px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:var(--ink);background:var(--paper)}
header{background:var(--band);color:#fff;padding:.6rem 1.2rem;display:flex;gap:1.4rem;align-items:center;flex-wrap:wrap}
header .mark{font-weight:700;letter-spacing:.08em;font-size:1.15rem}
header nav a{color:#fff;margin-right:1rem}
header .who{margin-left:auto;font-size:.9rem}
header form{display:inline}
main{max-width:1180px;margin:0 auto;padding:1rem 1.2rem 3rem}
a{color:var(--link)}
a:focus,button:focus,input:focus,select:focus{outline:3px solid #e0a100;outline-offset:2px}
h1{font-size:1.45rem;margin:.6rem 0}
h2{font-size:1.12rem;margin:1.4rem 0 .5rem}
.caution{border:2px solid var(--accent);background:#fdf1e7;padding:.55rem .9rem;margin:.8rem 0}
.card{background:var(--card);border:1px solid var(--rule);padding:.8rem 1rem;margin:.6rem 0}
.queues{display:grid;grid-template-columns:repeat(auto-fit,minmax(300px,1fr));gap:.8rem}
table{border-collapse:collapse;width:100%}
th,td{text-align:left;padding:.3rem .5rem;border-bottom:1px solid var(--rule);vertical-align:top}
th{font-weight:600;background:#eeebe2}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
.meter{height:.7rem;background:#e3dfd4;border:1px solid var(--rule)}
.meter span{display:block;height:100%;background:var(--accent)}
button{font:inherit;padding:.35rem .9rem;border:2px solid var(--band);background:var(--band);color:#fff;cursor:pointer}
button.quiet{background:transparent;color:#fff;border-color:#fff}
label{display:block;font-weight:600;margin:.5rem 0 .15rem}
input,select{font:inherit;padding:.3rem;border:1px solid #6c6a63;min-width:14rem;background:#fff}
.errors{border:2px solid #a4161a;background:#fde8e8;padding:.5rem .9rem}
.notice{border:2px solid var(--ok);background:#e7f4ec;padding:.5rem .9rem}
.reasons li{margin:.15rem 0}
.grid{display:grid;grid-template-columns:repeat(auto-fit,minmax(520px,1fr));gap:1rem}
figure{margin:0;background:#fff;border:1px solid var(--rule);padding:.8rem}
svg{max-width:100%;height:auto}
dl{display:grid;grid-template-columns:minmax(0,13rem) minmax(0,1fr);gap:.25rem 1rem;margin:0}
dt{font-weight:600}
dd{margin:0;overflow-wrap:anywhere}
td.id,td.num{white-space:nowrap}
figure.net,figure.tl{padding:.3rem;margin:.5rem 0}
figcaption{font-size:.9rem;margin:.3rem .4rem}
.key{display:flex;gap:1.2rem;flex-wrap:wrap;font-size:.9rem;margin:.3rem .4rem}
.key span{display:inline-flex;align-items:center;gap:.35rem}
.key i{display:inline-block;width:1.6rem;height:.95rem;border:1.5px solid #55524b;background:#fff}
.key i.party{border-radius:50%;background:#e6eef0;border-color:#24403f}
.key i.inv{background:#fbe3cf;border-color:#8a3b12;border-width:2px}
.key i.fraud{background:#f4d6cf;border-color:#8a1c12;border-width:3px}
.score{font-variant-numeric:tabular-nums;font-weight:700}
";

pub const CAUTION: &str = "A referral is a prompt for human review, not a finding of fraud. Payment decisions follow the insurer's own procedures, fair claims handling rules and the law where it operates; use personal data and protected characteristics only as that law allows.";

fn page(title: &str, who: Option<(&Principal, &str)>, body: &str) -> Response {
    let mut out = String::new();
    let _ = write!(
        out,
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>{} · weir</title><style>{STYLE}</style></head><body><header><span class=\"mark\">weir</span>",
        esc(title)
    );
    if let Some((p, csrf)) = who {
        out.push_str("<nav aria-label=\"main\">");
        if p.has_any(&[Role::Investigator]) {
            out.push_str("<a href=\"/ui/queues\">Queues</a>");
        }
        if p.has_any(&[Role::Investigator, Role::Analyst]) {
            out.push_str("<a href=\"/ui/rings\">Rings</a>");
        }
        if p.has_any(&[Role::Analyst]) {
            out.push_str("<a href=\"/ui/monitoring\">Monitoring</a>");
        }
        let _ = write!(
            out,
            "</nav><span class=\"who\">signed in as <strong>{}</strong> <form method=\"post\" action=\"/ui/logout\"><input type=\"hidden\" name=\"csrf\" value=\"{}\"><button class=\"quiet\" type=\"submit\">Sign out</button></form></span>",
            esc(&p.name),
            esc(csrf)
        );
    }
    let _ = write!(
        out,
        "</header><main><p class=\"caution\" role=\"note\"><strong>Caution.</strong> {CAUTION}</p>{body}</main></body></html>"
    );
    let mut r = out.into_response();
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/html; charset=utf-8"),
    );
    r.headers_mut()
        .insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    r.headers_mut().insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static("default-src 'none'; style-src 'unsafe-inline'; img-src 'self' data:; form-action 'self'; frame-ancestors 'none'"),
    );
    r
}

fn status_page(
    status: StatusCode,
    title: &str,
    who: Option<(&Principal, &str)>,
    body: &str,
) -> Response {
    let mut r = page(title, who, body);
    *r.status_mut() = status;
    r
}

/// A server error, logged with its cause; the page says only that it failed.
fn failed(who: (&Principal, &str), what: &str, cause: &dyn std::fmt::Display) -> Response {
    tracing::error!(error = %cause, "{what} failed");
    status_page(
        StatusCode::INTERNAL_SERVER_ERROR,
        "Error",
        Some(who),
        "<h1>Something went wrong</h1><p>It has been logged.</p>",
    )
}

/// A form whose token is not the session's (forged, or from an earlier session).
fn form_expired(who: (&Principal, &str), page: &str) -> Response {
    status_page(
        StatusCode::FORBIDDEN,
        "Form expired",
        Some(who),
        &format!("<h1>Form expired</h1><p>Reload the {page} page and try again.</p>"),
    )
}

fn session_id(headers: &HeaderMap) -> Option<String> {
    headers
        .get_all(header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|kv| kv.trim().split_once('='))
        .find(|(k, _)| *k == COOKIE)
        .map(|(_, v)| v.to_string())
}

/// The signed-in caller holding one of `roles`, or the response to send instead (sign-in
/// page for nobody, 403 page for the wrong role). Handlers return the refusal at once, so
/// its size does not matter.
#[allow(clippy::result_large_err)]
fn require(
    st: &AppState,
    headers: &HeaderMap,
    roles: &[Role],
) -> Result<(Principal, String), Response> {
    let Some((p, csrf)) = session_id(headers).and_then(|id| st.sessions.get(&id)) else {
        return Err(Redirect::to("/ui/login").into_response());
    };
    if !p.has_any(roles) {
        let needed: Vec<&str> = roles.iter().map(|r| r.as_str()).collect();
        let body = format!(
            "<h1>Not for this key</h1><p>This page needs one of the roles <strong>{}</strong>; the key <strong>{}</strong> does not hold them.</p>",
            needed.join(", "),
            esc(&p.name)
        );
        return Err(status_page(
            StatusCode::FORBIDDEN,
            "Not allowed",
            Some((&p, &csrf)),
            &body,
        ));
    }
    Ok((p, csrf))
}

fn check_csrf(given: Option<&String>, csrf: &str) -> bool {
    use subtle::ConstantTimeEq;
    given.is_some_and(|g| bool::from(g.as_bytes().ct_eq(csrf.as_bytes())))
}

fn login_form(error: Option<&str>) -> String {
    let mut body = String::from("<h1>Sign in</h1>");
    if let Some(e) = error {
        let _ = write!(body, "<p class=\"errors\" role=\"alert\">{}</p>", esc(e));
    }
    body.push_str("<form class=\"card\" method=\"post\" action=\"/ui/login\"><label for=\"key\">API key</label><input id=\"key\" name=\"key\" type=\"password\" autocomplete=\"off\" required autofocus><p>Your administrator gives you a key with your role (investigator or analyst). It is checked against the key file and never stored in the browser: the browser keeps a session for eight hours.</p><button type=\"submit\">Sign in</button></form>");
    body
}

async fn login_page() -> Response {
    page("Sign in", None, &login_form(None))
}

async fn login(State(st): State<AppState>, Form(f): Form<HashMap<String, String>>) -> Response {
    let key = f.get("key").map(String::as_str).unwrap_or("").trim();
    match st
        .settings
        .access
        .authenticate(Some(&format!("Bearer {key}")))
    {
        Ok(p) => {
            tracing::info!(caller = %p.name, "signed in to the web pages");
            let home = if p.has_any(&[Role::Investigator]) {
                "/ui/queues"
            } else {
                "/ui/monitoring"
            };
            let (id, _) = st.sessions.start(p);
            let mut r = Redirect::to(home).into_response();
            if let Ok(v) = HeaderValue::from_str(&format!(
                "{COOKIE}={id}; Path=/ui; HttpOnly; SameSite=Strict; Max-Age={}",
                SESSION_LIFETIME.as_secs()
            )) {
                r.headers_mut().insert(header::SET_COOKIE, v);
            }
            r
        }
        Err(_) => {
            st.svc
                .metrics
                .auth_refused
                .with_label_values(&["unknown_key"])
                .inc();
            status_page(
                StatusCode::UNAUTHORIZED,
                "Sign in",
                None,
                &login_form(Some("That key is not recognised.")),
            )
        }
    }
}

async fn logout(
    State(st): State<AppState>,
    headers: HeaderMap,
    Form(f): Form<HashMap<String, String>>,
) -> Response {
    if let Some(id) = session_id(&headers)
        && let Some((_, csrf)) = st.sessions.get(&id)
        && check_csrf(f.get("csrf"), &csrf)
    {
        st.sessions.end(&id);
    }
    let mut r = Redirect::to("/ui/login").into_response();
    r.headers_mut().insert(
        header::SET_COOKIE,
        HeaderValue::from_static("weir_session=; Path=/ui; HttpOnly; SameSite=Strict; Max-Age=0"),
    );
    r
}

/// An amount as an investigator reads it: currency, thousands separators, cents.
fn money(currency: &str, x: f64) -> String {
    let all = (x.abs() * 100.0).round();
    let whole = crate::features::fmt_amount((all / 100.0).trunc());
    let sign = if x < 0.0 && all > 0.0 { "-" } else { "" };
    format!("{} {sign}{whole}.{:02}", esc(currency), all as u64 % 100)
}

async fn queues_page(State(st): State<AppState>, headers: HeaderMap) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let mut body = String::from("<h1>Review queues</h1><div class=\"queues\">");
    for (q, cap) in st.settings.capacities.iter() {
        let depth = st.svc.store.queue_depth(*q);
        let days = if *cap > 0.0 {
            depth as f64 / cap
        } else {
            f64::INFINITY
        };
        let fill = (days / 30.0).min(1.0) * 100.0;
        let _ = write!(
            body,
            "<section class=\"card\" aria-labelledby=\"q-{q}\"><h2 id=\"q-{q}\">{}</h2><p><strong>{depth}</strong> waiting; the team works {cap} a day, so about <strong>{days:.0} days</strong> of work.</p><div class=\"meter\" role=\"img\" aria-label=\"{days:.0} days of work, scale to 30\"><span style=\"width:{fill:.0}%\"></span></div><form method=\"post\" action=\"/ui/queues/{q}/lease\"><input type=\"hidden\" name=\"csrf\" value=\"{}\"><p><button type=\"submit\">Take the next {} item</button></p></form></section>",
            queue_title(*q),
            esc(&csrf),
            q.as_str().replace('_', " ")
        );
    }
    body.push_str("</div>");
    for (q, _) in st.settings.capacities.iter() {
        let items = st.svc.store.queue_page(*q, 0, 25).unwrap_or_default();
        let order = if *q == Queue::Audit {
            "drawn at random, in no order of suspicion"
        } else {
            "highest priority first"
        };
        let _ = write!(body, "<h2>{} — {order}</h2>", queue_title(*q));
        if items.is_empty() {
            body.push_str("<p>Nothing waiting.</p>");
            continue;
        }
        body.push_str("<table><thead><tr><th scope=\"col\">Claim</th><th scope=\"col\" class=\"num\">Amount</th><th scope=\"col\" class=\"num\">Probability</th><th scope=\"col\" class=\"num\">Outlier</th><th scope=\"col\">Why</th><th scope=\"col\">Taken by</th></tr></thead><tbody>");
        let now = chrono::Utc::now().timestamp();
        for it in items {
            let lease = it
                .lease
                .as_ref()
                .filter(|l| l.until > now)
                .map_or(String::from("—"), |l| esc(&l.holder));
            let reasons: Vec<String> = it.reasons.iter().map(|r| esc(&r.text)).collect();
            let _ = write!(
                body,
                "<tr><td class=\"id\"><a href=\"/ui/claims/{}\">{}</a></td><td class=\"num\">{}</td><td class=\"num\">{:.0}%</td><td class=\"num\">{:.2}</td><td>{}</td><td>{}</td></tr>",
                url_segment(&it.claim_id),
                esc(&it.claim_id),
                money(&it.currency, it.claimed_amount),
                it.model_probability * 100.0,
                it.outlier_score,
                reasons.join("; "),
                lease
            );
        }
        body.push_str("</tbody></table>");
    }
    page("Queues", Some((&p, &csrf)), &body)
}

fn queue_title(q: Queue) -> &'static str {
    match q {
        Queue::Investigate => "Investigate",
        Queue::DeskCheck => "Desk check",
        Queue::Audit => "Audit sample",
        Queue::NoReview => "No review",
    }
}

/// Percent-encode a path segment (claim ids may hold any printable character).
fn url_segment(s: &str) -> String {
    let mut out = String::new();
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
            out.push(b as char);
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

async fn lease_next(
    State(st): State<AppState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    Form(f): Form<HashMap<String, String>>,
) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    if !check_csrf(f.get("csrf"), &csrf) {
        return form_expired((&p, &csrf), "queue");
    }
    let Ok(queue) = queue_param(&name) else {
        return status_page(
            StatusCode::NOT_FOUND,
            "No such queue",
            Some((&p, &csrf)),
            "<h1>No such queue</h1>",
        );
    };
    match st.svc.lease(queue, &p.name, chrono::Utc::now()).await {
        Ok(Some(item)) => Redirect::to(&format!(
            "/ui/claims/{}?taken=1",
            url_segment(&item.claim_id)
        ))
        .into_response(),
        Ok(None) => status_page(
            StatusCode::OK,
            "Queue empty",
            Some((&p, &csrf)),
            "<h1>Nothing to take</h1><p>Every item in this queue is taken or the queue is empty. <a href=\"/ui/queues\">Back to the queues</a>.</p>",
        ),
        Err(e) => failed((&p, &csrf), "lease from the web page", &e),
    }
}

async fn claim_page(
    State(st): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
    uri: axum::http::Uri,
) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator, Role::Analyst]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let notice = match uri.query().unwrap_or("") {
        q if q.contains("taken=1") => Some("This claim is now leased to you."),
        q if q.contains("recorded=1") => Some("Outcome recorded."),
        _ => None,
    };
    render_claim(&st, &p, &csrf, &id, notice, &[], None)
}

fn render_claim(
    st: &AppState,
    p: &Principal,
    csrf: &str,
    id: &str,
    notice: Option<&str>,
    errors: &[crate::claim::FieldError],
    form: Option<&HashMap<String, String>>,
) -> Response {
    let who = Some((p, csrf));
    if check_id("claim_id", id).is_err() {
        return status_page(
            StatusCode::NOT_FOUND,
            "No such claim",
            who,
            "<h1>No such claim</h1>",
        );
    }
    let revs = st.svc.store.revisions(id).unwrap_or_default();
    let Some(last) = revs.last() else {
        return status_page(
            StatusCode::NOT_FOUND,
            "No such claim",
            who,
            &format!("<h1>No claim {}</h1>", esc(id)),
        );
    };
    let c = &last.claim;
    let mut b = String::new();
    let _ = write!(b, "<h1>Claim {}</h1>", esc(id));
    if let Some(n) = notice {
        let _ = write!(b, "<p class=\"notice\" role=\"status\">{}</p>", esc(n));
    }
    let _ = write!(
        b,
        "<div class=\"grid\"><section class=\"card\" aria-labelledby=\"dec\"><h2 id=\"dec\">Decision</h2><dl><dt>Queue</dt><dd>{}</dd><dt>Probability the referral is worth it</dt><dd>{:.0}%</dd><dt>Outlier score</dt><dd>{:.2} (share of similar training claims closer to their cluster's centre)</dd><dt>Priority</dt><dd>{} (expected saving with linked exposure, in the claim's currency)</dd><dt>Decided</dt><dd>{} by model {} and rules {}</dd></dl><h3>Why it was referred</h3><ul class=\"reasons\">",
        queue_title(last.queue),
        last.model_probability * 100.0,
        last.outlier_score,
        crate::features::fmt_amount(last.priority),
        when(&last.decided_at),
        esc(&last.model_version),
        esc(&last.rules_version)
    );
    if last.reasons.is_empty() {
        b.push_str("<li>No reason stood out.</li>");
    }
    for r in &last.reasons {
        let _ = write!(b, "<li>{}</li>", esc(&r.text));
    }
    let _ = write!(
        b,
        "</ul></section><section class=\"card\" aria-labelledby=\"cl\"><h2 id=\"cl\">The claim</h2><dl><dt>Policy</dt><dd>{}</dd><dt>Claimant</dt><dd>{}</dd><dt>Line</dt><dd>{:?}</dd><dt>Loss</dt><dd>{}{}</dd><dt>Reported</dt><dd>{}</dd><dt>Policy start</dt><dd>{}</dd><dt>Claimed</dt><dd>{} of {} insured</dd><dt>Police report</dt><dd>{}</dd><dt>Injury / theft / total loss</dt><dd>{} / {} / {}</dd><dt>Parties</dt><dd>{}</dd></dl></section></div>",
        esc(&c.policy_id),
        esc(&c.claimant_id),
        c.line,
        c.loss_date,
        c.loss_time
            .map(|t| format!(" at {}", t.format("%H:%M")))
            .unwrap_or_default(),
        c.reported_at.format("%Y-%m-%d %H:%M UTC"),
        c.policy_start,
        money(&c.currency, c.claimed_amount),
        money(&c.currency, c.sum_insured),
        if c.circumstances.police_report {
            "yes"
        } else {
            "no"
        },
        yes(c.circumstances.injury),
        yes(c.circumstances.theft),
        yes(c.circumstances.total_loss),
        c.parties
            .iter()
            .map(|p| format!("{} {}", p.role.as_str().replace('_', " "), esc(&p.id)))
            .collect::<Vec<_>>()
            .join(", "),
    );
    // The claim's component of the claims graph, drawn, on a time line, and party by party.
    b.push_str(&component_section(st, c));
    // Revisions.
    b.push_str("<h2>Revisions</h2><table><thead><tr><th scope=\"col\">Revision</th><th scope=\"col\">Decided</th><th scope=\"col\">Queue</th><th scope=\"col\" class=\"num\">Probability</th><th scope=\"col\">Filed by</th></tr></thead><tbody>");
    for r in &revs {
        let _ = write!(
            b,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"num\">{:.0}%</td><td>{}</td></tr>",
            r.revision,
            when(&r.decided_at),
            queue_title(r.queue),
            r.model_probability * 100.0,
            esc(r.submitted_by.as_deref().unwrap_or("—"))
        );
    }
    b.push_str("</tbody></table>");
    // Audit record.
    let _ = write!(
        b,
        "<h2>Audit record</h2><details class=\"card\"><summary>Every feature as computed at decision time, and the rules that fired ({})</summary><table><thead><tr><th scope=\"col\">Feature</th><th scope=\"col\" class=\"num\">Value</th></tr></thead><tbody>",
        if last.rules_fired.is_empty() {
            "none".to_string()
        } else {
            esc(&last.rules_fired.join(", "))
        }
    );
    for (name, v) in &last.features {
        let _ = write!(
            b,
            "<tr><td>{}</td><td class=\"num\">{v:.3}</td></tr>",
            esc(name)
        );
    }
    let _ = write!(
        b,
        "</tbody></table><p>Content hash {}</p></details>",
        esc(&last.content_hash)
    );
    // Outcomes.
    let history = st.svc.store.outcome_history(id).unwrap_or_default();
    b.push_str("<h2>Outcome</h2>");
    if history.is_empty() {
        b.push_str("<p>No outcome recorded yet.</p>");
    } else {
        b.push_str("<table><thead><tr><th scope=\"col\">Revision</th><th scope=\"col\">Outcome</th><th scope=\"col\">Adjudicated</th><th scope=\"col\">Decided by</th><th scope=\"col\" class=\"num\">Saved</th><th scope=\"col\" class=\"num\">Recovered</th><th scope=\"col\">Recorded by</th></tr></thead><tbody>");
        for o in &history {
            let _ = write!(
                b,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td>{}</td></tr>",
                o.revision,
                outcome_words(o.report.outcome),
                o.report.adjudicated_on,
                esc(&o.report.decided_by),
                crate::features::fmt_amount(o.report.amount_saved),
                crate::features::fmt_amount(o.report.amount_recovered),
                esc(o.posted_by.as_deref().unwrap_or("—"))
            );
        }
        b.push_str("</tbody></table>");
    }
    if p.has_any(&[Role::Investigator]) {
        if !errors.is_empty() {
            b.push_str(
                "<div class=\"errors\" role=\"alert\"><p>The outcome was not recorded:</p><ul>",
            );
            for e in errors {
                let _ = write!(
                    b,
                    "<li><strong>{}</strong>: {}</li>",
                    esc(&e.field.replace('_', " ")),
                    esc(&e.problem)
                );
            }
            b.push_str("</ul></div>");
        }
        let val = |k: &str| {
            form.and_then(|f| f.get(k))
                .map(|v| esc(v))
                .unwrap_or_default()
        };
        let chosen = form
            .and_then(|f| f.get("outcome"))
            .cloned()
            .unwrap_or_default();
        let _ = write!(
            b,
            "<form class=\"card\" method=\"post\" action=\"/ui/claims/{}/outcome\"><input type=\"hidden\" name=\"csrf\" value=\"{}\"><label for=\"outcome\">Outcome of the review</label><select id=\"outcome\" name=\"outcome\" required><option value=\"\">choose…</option>",
            url_segment(id),
            esc(csrf)
        );
        for o in Outcome::ALL {
            let _ = write!(
                b,
                "<option value=\"{}\"{}>{}</option>",
                o.as_str(),
                if chosen == o.as_str() {
                    " selected"
                } else {
                    ""
                },
                outcome_words(o)
            );
        }
        let today = chrono::Utc::now().date_naive().to_string();
        let date = form
            .and_then(|f| f.get("adjudicated_on"))
            .map_or(today, |v| esc(v));
        let _ = write!(
            b,
            "</select><label for=\"adjudicated_on\">Adjudicated on</label><input id=\"adjudicated_on\" name=\"adjudicated_on\" type=\"date\" value=\"{date}\" required><label for=\"decided_by\">Decided by (person or panel id)</label><input id=\"decided_by\" name=\"decided_by\" value=\"{}\" required><label for=\"amount_saved\">Payment avoided ({})</label><input id=\"amount_saved\" name=\"amount_saved\" inputmode=\"decimal\" value=\"{}\"><label for=\"amount_recovered\">Recovered after payment ({})</label><input id=\"amount_recovered\" name=\"amount_recovered\" inputmode=\"decimal\" value=\"{}\"><p><button type=\"submit\">Record outcome</button></p></form>",
            val("decided_by"),
            esc(&c.currency),
            val("amount_saved"),
            esc(&c.currency),
            val("amount_recovered"),
        );
    }
    let status = if errors.is_empty() {
        StatusCode::OK
    } else {
        StatusCode::UNPROCESSABLE_ENTITY
    };
    status_page(status, &format!("Claim {id}"), who, &b)
}

/// An RFC 3339 time as minutes in UTC.
fn when(t: &str) -> String {
    chrono::DateTime::parse_from_rfc3339(t).map_or_else(
        |_| esc(t),
        |d| {
            d.with_timezone(&chrono::Utc)
                .format("%Y-%m-%d %H:%M UTC")
                .to_string()
        },
    )
}

fn yes(x: bool) -> &'static str {
    if x { "yes" } else { "no" }
}

fn outcome_words(o: Outcome) -> &'static str {
    match o {
        Outcome::FraudConfirmed => "Fraud confirmed",
        Outcome::Inflated => "Genuine loss, amount inflated",
        Outcome::Genuine => "Genuine: nothing wrong found",
        Outcome::NotProven => "Suspicion not proven",
        Outcome::Withdrawn => "Withdrawn by the claimant",
    }
}

async fn post_outcome(
    State(st): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
    Form(f): Form<HashMap<String, String>>,
) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    if !check_csrf(f.get("csrf"), &csrf) {
        return form_expired((&p, &csrf), "claim");
    }
    // The form's strings become the API's JSON, so the API's validation applies unchanged.
    let mut v = serde_json::Map::new();
    let mut errors = Vec::new();
    for k in ["outcome", "adjudicated_on", "decided_by"] {
        if let Some(x) = f.get(k).filter(|x| !x.trim().is_empty()) {
            v.insert(k.into(), serde_json::Value::String(x.trim().to_string()));
        }
    }
    for k in ["amount_saved", "amount_recovered"] {
        let raw = f.get(k).map(|x| x.trim()).unwrap_or("");
        if raw.is_empty() {
            continue;
        }
        match raw.replace(',', "").parse::<f64>() {
            Ok(x) if x.is_finite() => {
                v.insert(k.into(), serde_json::json!(x));
            }
            _ => errors.push(crate::claim::FieldError {
                field: k.into(),
                problem: "expected a number, e.g. 1200.50".into(),
            }),
        }
    }
    let report = crate::feedback::OutcomeReport::from_value(&serde_json::Value::Object(v));
    let report = match (report, errors.is_empty()) {
        (Ok(r), true) => r,
        (Err(mut e), _) => {
            e.extend(errors);
            return render_claim(&st, &p, &csrf, &id, None, &e, Some(&f));
        }
        (Ok(_), false) => return render_claim(&st, &p, &csrf, &id, None, &errors, Some(&f)),
    };
    match st
        .svc
        .record_outcome_as(&id, report, chrono::Utc::now(), Some(&p.name))
        .await
    {
        Ok(Some(_)) => {
            Redirect::to(&format!("/ui/claims/{}?recorded=1", url_segment(&id))).into_response()
        }
        Ok(None) => status_page(
            StatusCode::NOT_FOUND,
            "No such claim",
            Some((&p, &csrf)),
            "<h1>No such claim</h1>",
        ),
        Err(e) => failed((&p, &csrf), "outcome from the web page", &e),
    }
}

async fn monitoring_page(State(st): State<AppState>, headers: HeaderMap) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Analyst]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let svc = st.svc.clone();
    let capacity = st.settings.referral_capacity();
    let built = tokio::task::spawn_blocking(move || {
        let now = chrono::Utc::now();
        let data = svc.report_data(now, capacity)?;
        let fairness = svc.fairness()?;
        let compare = svc.compare()?;
        Ok::<_, crate::service::ServiceError>((data, fairness, compare))
    })
    .await;
    let (data, fairness, compare) = match built {
        Ok(Ok(x)) => x,
        Ok(Err(e)) => return failed((&p, &csrf), "monitoring page", &e),
        Err(e) => return failed((&p, &csrf), "monitoring page", &e),
    };
    let mut b = String::from("<h1>Monitoring</h1>");
    b.push_str(&crate::report::render_body(&data));
    b.push_str("<h2>Drift per feature</h2><table><thead><tr><th scope=\"col\">Feature or score</th><th scope=\"col\" class=\"num\">PSI</th><th scope=\"col\" class=\"num\">KS</th><th scope=\"col\">Reading</th><th scope=\"col\" class=\"num\">Recent claims</th></tr></thead><tbody>");
    for r in data.drift.scores.iter().chain(&data.drift.features) {
        let band = serde_json::to_value(r.band)
            .ok()
            .and_then(|v| v.as_str().map(String::from))
            .unwrap_or_default();
        let _ = write!(
            b,
            "<tr><td>{}</td><td class=\"num\">{:.3}</td><td class=\"num\">{}</td><td>{}</td><td class=\"num\">{}</td></tr>",
            esc(&r.name),
            r.psi,
            r.ks.map_or("—".into(), |k| format!("{k:.3}")),
            esc(&band),
            r.current_n
        );
    }
    b.push_str("</tbody></table>");
    let _ = write!(
        b,
        "<h2>Referral rates by segment</h2><p>A value is marked when its referral rate is below {:.0}% of the highest in its segment (the four-fifths convention, imported; not a legal test for insurance). A mark is a prompt to look, not a conclusion.</p><table><thead><tr><th scope=\"col\">Segment</th><th scope=\"col\">Value</th><th scope=\"col\" class=\"num\">Claims</th><th scope=\"col\" class=\"num\">Referred</th><th scope=\"col\" class=\"num\">Rate</th><th scope=\"col\" class=\"num\">Ratio to highest</th><th scope=\"col\">Mark</th></tr></thead><tbody>",
        st.svc.monitor.fairness_bound * 100.0
    );
    for r in &fairness {
        let _ = write!(
            b,
            "<tr><td>{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{:.1}%</td><td class=\"num\">{:.2}</td><td>{}</td></tr>",
            esc(&r.segment),
            esc(&r.value),
            r.claims,
            r.referred,
            r.referral_rate * 100.0,
            r.ratio_to_highest,
            if r.flagged { "below the bound" } else { "" }
        );
    }
    b.push_str("</tbody></table>");
    let f = |x: Option<f64>, pct: bool| {
        x.map_or("—".to_string(), |v| {
            if pct {
                format!("{:.1}%", v * 100.0)
            } else {
                format!("{v:.3}")
            }
        })
    };
    let _ = write!(
        b,
        "<h2>Champion against challenger</h2><table><thead><tr><th scope=\"col\"></th><th scope=\"col\">Champion</th><th scope=\"col\">Challenger</th></tr></thead><tbody><tr><th scope=\"row\">Model</th><td>{}</td><td>{}</td></tr><tr><th scope=\"row\">ROC AUC (claims both scored, adjudicated)</th><td>{}</td><td>{}</td></tr><tr><th scope=\"row\">Precision of own referrals</th><td>{}</td><td>{}</td></tr></tbody></table><p>{} claims scored by both, {} adjudicated, agreement {}.</p>",
        esc(compare.champion_version.as_deref().unwrap_or("—")),
        esc(compare
            .challenger_version
            .as_deref()
            .unwrap_or("none loaded")),
        f(compare.champion_auc, false),
        f(compare.challenger_auc, false),
        f(compare.champion_precision, true),
        f(compare.challenger_precision, true),
        compare.claims_scored_by_both,
        compare.labelled,
        f(compare.agreement, true)
    );
    page("Monitoring", Some((&p, &csrf)), &b)
}

/// Short words for an outcome, as drawings print them.
fn outcome_short(o: Outcome) -> &'static str {
    match o {
        Outcome::FraudConfirmed => "confirmed fraud",
        Outcome::Inflated => "inflated",
        Outcome::Genuine => "genuine",
        Outcome::NotProven => "not proven",
        Outcome::Withdrawn => "withdrawn",
    }
}

fn member_facts(m: &crate::rings::Member) -> crate::drawing::ClaimFacts {
    crate::drawing::ClaimFacts {
        amount: money(&m.currency, m.amount),
        date: m.reported_at.get(..10).unwrap_or("").to_string(),
        queue: m
            .queue
            .map_or("—".to_string(), |q| queue_title(q).to_lowercase()),
        outcome: m.outcome.map(outcome_short).unwrap_or("").to_string(),
    }
}

/// The drawing, the time line and the member table of a ring, with `focus` the claim the page
/// is about.
fn ring_body(
    ring: &crate::rings::Ring,
    c: &crate::graph::Component,
    focus: u64,
    mark_focus: bool,
) -> String {
    let by_id: HashMap<&str, &crate::rings::Member> = ring
        .members
        .iter()
        .map(|m| (m.claim_id.as_str(), m))
        .collect();
    let facts = |n: &crate::graph::ClaimNode| match by_id.get(n.claim_id.as_str()) {
        Some(m) => member_facts(m),
        None => crate::drawing::ClaimFacts {
            amount: crate::features::fmt_amount(n.amount),
            date: String::new(),
            queue: String::new(),
            outcome: String::new(),
        },
    };
    let link = |id: &str| format!("/ui/claims/{}", url_segment(id));
    let mut b = String::new();
    let _ = write!(
        b,
        "<figure class=\"net\">{}<figcaption><div class=\"key\"><span><i></i> claim (its id, report date, amount, queue or outcome)</span><span><i class=\"party\"></i> party tying two or more claims</span><span><i class=\"inv\"></i> claim in the investigate queue</span><span><i class=\"fraud\"></i> claim confirmed as fraud</span>{}</div></figcaption></figure>",
        crate::drawing::network_svg(c, focus, mark_focus, &facts, &link),
        if mark_focus {
            "<span>double frame: the claim this page is about</span>"
        } else {
            ""
        }
    );
    let _ = write!(
        b,
        "<h3>Time line</h3><figure class=\"tl\">{}</figure>",
        crate::drawing::timeline_svg(c, if mark_focus { focus } else { 0 }, &facts)
    );
    // Who ties whom: one row per party, with its claims.
    b.push_str("<h3>Parties that tie these claims</h3><table><thead><tr><th scope=\"col\">Party</th><th scope=\"col\" class=\"num\">Claims</th><th scope=\"col\">Its claims in this group</th></tr></thead><tbody>");
    for t in &ring.ties {
        let list: Vec<String> = t
            .claims
            .iter()
            .map(|id| format!("<a href=\"{}\">{}</a>", link(id), esc(id)))
            .collect();
        let _ = write!(
            b,
            "<tr><td>{} <strong>{}</strong></td><td class=\"num\">{}</td><td>{}</td></tr>",
            esc(&t.kind.replace('_', " ")),
            esc(&t.id),
            t.claims.len(),
            list.join(", ")
        );
    }
    b.push_str("</tbody></table>");
    b.push_str("<h3>Claims, in report order</h3><table><thead><tr><th scope=\"col\">Claim</th><th scope=\"col\">Reported</th><th scope=\"col\">Loss</th><th scope=\"col\">Claimant</th><th scope=\"col\" class=\"num\">Amount</th><th scope=\"col\">Queue</th><th scope=\"col\">Outcome</th></tr></thead><tbody>");
    for m in &ring.members {
        let _ = write!(
            b,
            "<tr><td class=\"id\"><a href=\"{}\">{}</a></td><td>{}</td><td>{}</td><td>{}</td><td class=\"num\">{}</td><td>{}</td><td>{}</td></tr>",
            link(&m.claim_id),
            esc(&m.claim_id),
            when(&m.reported_at),
            esc(&m.loss_date),
            esc(&m.claimant_id),
            money(&m.currency, m.amount),
            m.queue.map_or("—", queue_title),
            m.outcome.map_or("open", outcome_words)
        );
    }
    b.push_str("</tbody></table>");
    if !ring.hubs.is_empty() {
        b.push_str("<h3>Busy parties not followed</h3><p>These name more claims in the window than their kind's cap, so they link nothing (a busy body shop is not suspicious for being busy):</p><ul>");
        for h in &ring.hubs {
            let _ = write!(
                b,
                "<li>{}: {} claims or more (cap {})</li>",
                esc(&crate::graph::party_words(&h.party)),
                h.claims,
                h.cap
            );
        }
        b.push_str("</ul>");
    }
    b
}

/// The claim page's section on its component.
fn component_section(st: &AppState, claim: &crate::claim::Claim) -> String {
    let svc = &st.svc;
    let now = chrono::Utc::now().timestamp();
    let read = || -> Result<Option<(crate::rings::Ring, crate::graph::Component)>, crate::service::ServiceError> {
        let as_of = svc.rings_as_of(now)?;
        match svc.component_of(&claim.claim_id, as_of)? {
            Some(c) => Ok(Some((svc.ring_view(&c, as_of)?, c))),
            None => Ok(None),
        }
    };
    let mut b = String::from("<h2 id=\"linked\">Linked claims</h2>");
    match read() {
        Err(e) => {
            tracing::error!(error = %e, "claim page: component read failed");
            b.push_str("<p class=\"errors\">The linked claims could not be read; this has been logged.</p>");
        }
        Ok(None) => b.push_str("<p>None.</p>"),
        Ok(Some((ring, c))) if c.members.len() < 2 => {
            let _ = write!(
                b,
                "<p>No other claim in the year to {} shares a person, account, household or address with this one, or two of its firms.</p>",
                when(&ring.as_of)
            );
            if !ring.hubs.is_empty() {
                let names: Vec<String> = ring
                    .hubs
                    .iter()
                    .map(|h| esc(&crate::graph::party_words(&h.party)))
                    .collect();
                let _ = write!(
                    b,
                    "<p>Busy parties not followed (above their kind's cap): {}.</p>",
                    names.join(", ")
                );
            }
        }
        Ok(Some((ring, c))) => {
            let focus = crate::features::stable_hash(&claim.claim_id);
            let _ = write!(
                b,
                "<p>This claim belongs to group <a href=\"/ui/rings/{}\">{}</a>: <strong>{}</strong> claims by <strong>{}</strong> claimants within the year to {}, {} reported in its last 30 days, {} referred or confirmed as fraud, {} in all{}. Ring score <span class=\"score\">{:.1}</span>.</p>",
                url_segment(&ring.id),
                esc(&ring.id),
                ring.facts.claims,
                ring.facts.claimants,
                when(&ring.as_of),
                ring.facts.recent,
                ring.facts.flagged,
                crate::features::fmt_amount(ring.facts.amount),
                if ring.truncated {
                    " (followed to the bound; there are more)"
                } else {
                    ""
                },
                ring.score
            );
            b.push_str(&ring_body(&ring, &c, focus, true));
        }
    }
    b.push_str(&shared_alone(st, claim));
    b
}

/// Parties this claim shares with other claims that tie nothing on their own (a firm other
/// claims name without a second firm in common, a hub): one row per party, its claims counted
/// and the first few named.
fn shared_alone(st: &AppState, claim: &crate::claim::Claim) -> String {
    let Ok(linked) = st.svc.store.linked_claims(claim, 365 * 86_400) else {
        return String::new();
    };
    let mut by_party: std::collections::BTreeMap<&str, Vec<&str>> = Default::default();
    for (via, other) in &linked {
        by_party
            .entry(via.as_str())
            .or_default()
            .push(other.as_str());
    }
    let as_of = st
        .svc
        .rings_as_of(chrono::Utc::now().timestamp())
        .unwrap_or(i64::MAX);
    let tied: std::collections::HashSet<String> = st
        .svc
        .component_of(&claim.claim_id, as_of)
        .ok()
        .flatten()
        .map(|c| c.ties.into_iter().map(|t| t.key).collect())
        .unwrap_or_default();
    let rows: Vec<_> = by_party
        .iter()
        .filter(|(k, _)| !tied.contains(**k))
        .collect();
    if rows.is_empty() {
        return String::new();
    }
    let mut b = String::from(
        "<h3>Also shared, tying nothing on its own</h3><p>Other claims within a year before or after this one that name one of its parties, where that alone is not a tie (one firm in common, or a party above its kind's cap).</p><table><thead><tr><th scope=\"col\">Party</th><th scope=\"col\" class=\"num\">Other claims</th><th scope=\"col\">First of them</th></tr></thead><tbody>",
    );
    for (party, claims) in rows {
        let list: Vec<String> = claims
            .iter()
            .take(8)
            .map(|id| format!("<a href=\"/ui/claims/{}\">{}</a>", url_segment(id), esc(id)))
            .collect();
        let _ = write!(
            b,
            "<tr><td>{}</td><td class=\"num\">{}</td><td>{}{}</td></tr>",
            esc(&crate::graph::party_words(party)),
            claims.len(),
            list.join(", "),
            if claims.len() > 8 { ", …" } else { "" }
        );
    }
    b.push_str("</tbody></table>");
    b
}

async fn rings_page(State(st): State<AppState>, headers: HeaderMap) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator, Role::Analyst]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let (as_of, rings) = match st.svc.rings(chrono::Utc::now().timestamp(), 50) {
        Ok(x) => x,
        Err(e) => return failed((&p, &csrf), "rings page", &e),
    };
    let g = st.svc.model().artifact.graph.clone();
    let as_of = chrono::DateTime::from_timestamp(as_of, 0)
        .map(|d| d.format("%Y-%m-%d %H:%M UTC").to_string())
        .unwrap_or_default();
    let mut b = format!(
        "<h1>Rings</h1><p>Groups of claims tied together by shared people, accounts, addresses and firms within the {} days to {as_of} (the latest claim reported), with two or more claimants, best score first. A group is a lead for an investigator to look at, not a finding.</p>",
        g.window_days
    );
    if rings.is_empty() {
        b.push_str("<p>No group of two or more claimants yet.</p>");
    } else {
        b.push_str("<table><thead><tr><th scope=\"col\" class=\"num\">Rank</th><th scope=\"col\">Group</th><th scope=\"col\" class=\"num\">Score</th><th scope=\"col\" class=\"num\">Claims</th><th scope=\"col\" class=\"num\">Claimants</th><th scope=\"col\" class=\"num\">Last 30 days</th><th scope=\"col\" class=\"num\">Referred or confirmed</th><th scope=\"col\" class=\"num\">Amount</th><th scope=\"col\">Reported</th><th scope=\"col\">Tied by</th></tr></thead><tbody>");
        for (i, r) in rings.iter().enumerate() {
            let ties: Vec<String> = r
                .ties
                .iter()
                .take(4)
                .map(|t| {
                    format!(
                        "{} {} ({})",
                        esc(&t.kind.replace('_', " ")),
                        esc(&t.id),
                        t.claims.len()
                    )
                })
                .collect();
            let currency = r.members.first().map_or("", |m| m.currency.as_str());
            let _ = write!(
                b,
                "<tr><td class=\"num\">{}</td><td class=\"id\"><a href=\"/ui/rings/{}\">{}</a></td><td class=\"num score\">{:.1}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td>{} to {}</td><td>{}{}</td></tr>",
                i + 1,
                url_segment(&r.id),
                esc(&r.id),
                r.score,
                r.facts.claims,
                r.facts.claimants,
                r.facts.recent,
                r.facts.flagged,
                money(currency, r.facts.amount),
                esc(r.first_reported.get(..10).unwrap_or("")),
                esc(r.last_reported.get(..10).unwrap_or("")),
                ties.join(", "),
                if r.ties.len() > 4 { ", …" } else { "" }
            );
        }
        b.push_str("</tbody></table>");
    }
    let caps: Vec<String> = g
        .caps
        .iter()
        .map(|(k, v)| format!("{} {v}", esc(&k.replace('_', " "))))
        .collect();
    let _ = write!(
        b,
        "<h2>How groups are found and ranked</h2><div class=\"card\"><p>Two claims are tied when they share a claimant, policy, address, payee account, witness or third party, or when they name the same two firms (repairer, medical provider, attorney): one busy firm in common says nothing. Ties are followed from claim to claim, up to {} claims.</p><p>A party naming more claims in the window than {} times the usual number for its kind (at least {}) ties nothing. Caps, measured when the model was trained: {}.</p><p>Score = (claimants − 1) × (1 + share reported in the last 30 days) × (1 + share referred or confirmed as fraud) × (1 + log<sub>10</sub>(1 + total amount / 10,000)). One person's own claims score 0.</p></div>",
        g.max_claims,
        g.hub_factor,
        g.hub_floor,
        if caps.is_empty() {
            "none measured (every kind at the floor)".to_string()
        } else {
            caps.join(", ")
        }
    );
    page("Rings", Some((&p, &csrf)), &b)
}

async fn ring_page(
    State(st): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator, Role::Analyst]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let who = Some((&p, csrf.as_str()));
    let not_found = || {
        status_page(
            StatusCode::NOT_FOUND,
            "No such group",
            who,
            "<h1>No such group</h1><p><a href=\"/ui/rings\">Back to the rings</a>.</p>",
        )
    };
    if check_id("ring_id", &id).is_err() {
        return not_found();
    }
    let svc = &st.svc;
    let read = || -> Result<Option<(crate::rings::Ring, crate::graph::Component)>, crate::service::ServiceError> {
        let Some(r) = svc.store.ring(&id)? else {
            return Ok(None);
        };
        let as_of = svc.rings_as_of(chrono::Utc::now().timestamp())?;
        match svc.component_of(&r.seed, as_of)? {
            Some(c) => Ok(Some((svc.ring_view(&c, as_of)?, c))),
            None => Ok(None),
        }
    };
    let (ring, c) = match read() {
        Ok(Some(x)) => x,
        Ok(None) => return not_found(),
        Err(e) => return failed((&p, &csrf), "ring page", &e),
    };
    // The drawing centres on the claim tied most.
    let focus = c
        .members
        .iter()
        .max_by_key(|m| (c.ties_of(m.claim).len(), std::cmp::Reverse(m.at)))
        .map_or(0, |m| m.claim);
    let mut b = format!(
        "<h1>Group {}</h1><p><strong>{}</strong> claims by <strong>{}</strong> claimants, reported {} to {}; {} in the last 30 days to {}; {} referred or confirmed as fraud; {} in all{}. Ring score <span class=\"score\">{:.1}</span>. <a href=\"/ui/rings/{}/graphml\">Download as GraphML</a> for a graph tool.</p>",
        esc(&ring.id),
        ring.facts.claims,
        ring.facts.claimants,
        esc(ring.first_reported.get(..10).unwrap_or("")),
        esc(ring.last_reported.get(..10).unwrap_or("")),
        ring.facts.recent,
        when(&ring.as_of),
        ring.facts.flagged,
        money(
            ring.members.first().map_or("", |m| m.currency.as_str()),
            ring.facts.amount
        ),
        if ring.truncated {
            " (followed to the bound; there are more)"
        } else {
            ""
        },
        ring.score,
        url_segment(&ring.id)
    );
    if ring.id != id {
        let _ = write!(
            b,
            "<p class=\"notice\">Group {} has since joined this group (its earliest claim is now {}).</p>",
            esc(&id),
            esc(ring.members.first().map_or("", |m| m.claim_id.as_str()))
        );
    }
    b.push_str(&ring_body(&ring, &c, focus, false));
    page(&format!("Group {}", ring.id), who, &b)
}

async fn ring_graphml(
    State(st): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
) -> Response {
    let (p, csrf) = match require(&st, &headers, &[Role::Investigator, Role::Analyst]) {
        Ok(x) => x,
        Err(r) => return r,
    };
    let svc = &st.svc;
    let read = || -> Result<Option<String>, crate::service::ServiceError> {
        if check_id("ring_id", &id).is_err() {
            return Ok(None);
        }
        let Some(r) = svc.store.ring(&id)? else {
            return Ok(None);
        };
        let as_of = svc.rings_as_of(chrono::Utc::now().timestamp())?;
        let Some(c) = svc.component_of(&r.seed, as_of)? else {
            return Ok(None);
        };
        let ring = svc.ring_view(&c, as_of)?;
        let by_id: HashMap<&str, &crate::rings::Member> = ring
            .members
            .iter()
            .map(|m| (m.claim_id.as_str(), m))
            .collect();
        Ok(Some(crate::graph::graphml(&c, &|n| {
            let m = by_id.get(n.claim_id.as_str());
            crate::graph::MemberFacts {
                queue: m
                    .and_then(|m| m.queue)
                    .map(|q| q.as_str().to_string())
                    .unwrap_or_default(),
                outcome: m
                    .and_then(|m| m.outcome)
                    .map(|o| o.as_str().to_string())
                    .unwrap_or_default(),
            }
        })))
    };
    match read() {
        Ok(Some(xml)) => {
            let mut r = xml.into_response();
            r.headers_mut().insert(
                header::CONTENT_TYPE,
                HeaderValue::from_static("application/graphml+xml"),
            );
            if let Ok(v) = HeaderValue::from_str(&format!(
                "attachment; filename=\"{}.graphml\"",
                url_segment(&id)
            )) {
                r.headers_mut().insert(header::CONTENT_DISPOSITION, v);
            }
            r
        }
        Ok(None) => status_page(
            StatusCode::NOT_FOUND,
            "No such group",
            Some((&p, &csrf)),
            "<h1>No such group</h1>",
        ),
        Err(e) => failed((&p, &csrf), "GraphML download", &e),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn money_has_separators_and_carries_cents() {
        assert_eq!(super::money("EUR", 322_965.333), "EUR 322,965.33");
        assert_eq!(super::money("GBP", 0.999), "GBP 1.00");
        assert_eq!(super::money("EUR", 1_000_000.0), "EUR 1,000,000.00");
        assert_eq!(super::money("EUR", -12.5), "EUR -12.50");
    }
}
