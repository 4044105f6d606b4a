//! End to end in headless Chromium: a real `weir serve` on loopback with API keys, driven
//! through Debian's `chromium` and `chromium-driver` over the W3C WebDriver protocol (a few
//! JSON calls, sent with weir's own small HTTP client rather than a WebDriver crate).
//!
//! An analyst signs in and reads the monitoring page (no outcomes yet); an investigator signs
//! in, sees the queues, takes the next item, opens the claim, records an outcome through the
//! form (after a wrong entry is refused with its field named); the analyst signs in again and
//! the monitoring page counts the outcome. Screenshots go to `target/browser/`.
//!
//! Without `chromedriver` on the PATH the test says so and stops; `.ci/run` installs it and
//! sets `BROWSER_TEST_REQUIRED=1`, which turns a missing browser into a failure.

use hyper::Method;
use serde_json::{Value, json};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use weir::access::{Role, add_key};

struct Driver {
    addr: SocketAddr,
    session: String,
}

const ELEMENT: &str = "element-6066-11e4-a52e-4f735466cecf";

impl Driver {
    async fn call(&self, method: Method, path: &str, body: Option<Value>) -> Value {
        let uri = format!("/session/{}{path}", self.session);
        let bytes = body.map(|b| b.to_string().into_bytes()).unwrap_or_default();
        let ct = (method == Method::POST).then_some("application/json");
        let r = weir::client::request(self.addr, None, method, &uri, ct, bytes)
            .await
            .unwrap();
        let v: Value = serde_json::from_slice(&r.body).unwrap();
        assert!(r.status.is_success(), "webdriver {uri}: {v}");
        v["value"].clone()
    }
    async fn goto(&self, url: &str) {
        self.call(Method::POST, "/url", Some(json!({ "url": url })))
            .await;
    }
    async fn find(&self, css: &str) -> String {
        let v = self
            .call(
                Method::POST,
                "/element",
                Some(json!({"using": "css selector", "value": css})),
            )
            .await;
        v[ELEMENT].as_str().unwrap().to_string()
    }
    async fn click(&self, css: &str) {
        let e = self.find(css).await;
        self.call(
            Method::POST,
            &format!("/element/{e}/click"),
            Some(json!({})),
        )
        .await;
    }
    async fn type_into(&self, css: &str, text: &str) {
        let e = self.find(css).await;
        self.call(
            Method::POST,
            &format!("/element/{e}/clear"),
            Some(json!({})),
        )
        .await;
        self.call(
            Method::POST,
            &format!("/element/{e}/value"),
            Some(json!({ "text": text })),
        )
        .await;
    }
    async fn source(&self) -> String {
        self.call(Method::GET, "/source", None)
            .await
            .as_str()
            .unwrap()
            .to_string()
    }
    /// The page source once it contains `needle` (a click that submits a form returns before
    /// the next page has always loaded); fails after ten seconds with the source.
    async fn wait_text(&self, needle: &str) -> String {
        let mut last = String::new();
        for _ in 0..100 {
            last = self.source().await;
            if last.contains(needle) {
                return last;
            }
            tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        }
        panic!("page never showed {needle:?}:\n{last}");
    }
    async fn url(&self) -> String {
        self.call(Method::GET, "/url", None)
            .await
            .as_str()
            .unwrap()
            .to_string()
    }
    async fn script(&self, js: &str) -> Value {
        self.call(
            Method::POST,
            "/execute/sync",
            Some(json!({"script": js, "args": []})),
        )
        .await
    }
    async fn screenshot(&self, path: &Path) {
        let b64 = self.call(Method::GET, "/screenshot", None).await;
        std::fs::write(path, base64_decode(b64.as_str().unwrap())).unwrap();
    }
    /// Every visible form control has a label, and the page has one `h1` (checked in the
    /// browser's own DOM).
    async fn assert_accessible_basics(&self, page: &str) {
        let v = self
            .script(
                "const bad = [...document.querySelectorAll('input:not([type=hidden]), select')]
                   .filter(e => !(e.id && document.querySelector('label[for=\"' + e.id + '\"]')));
                 return [bad.length, document.querySelectorAll('h1').length,
                         document.documentElement.lang];",
            )
            .await;
        assert_eq!(
            v,
            json!([0, 1, "en"]),
            "{page}: unlabelled controls, h1 count, lang"
        );
    }
}

fn base64_decode(s: &str) -> Vec<u8> {
    let val = |c: u8| match c {
        b'A'..=b'Z' => c - b'A',
        b'a'..=b'z' => c - b'a' + 26,
        b'0'..=b'9' => c - b'0' + 52,
        b'+' => 62,
        _ => 63,
    };
    let bytes: Vec<u8> = s
        .bytes()
        .filter(|b| !b"=\r\n".contains(b))
        .map(val)
        .collect();
    let mut out = Vec::with_capacity(bytes.len() * 3 / 4);
    for ch in bytes.chunks(4) {
        let n = ch
            .iter()
            .enumerate()
            .fold(0u32, |n, (i, &v)| n | (u32::from(v) << (18 - 6 * i)));
        out.extend_from_slice(&n.to_be_bytes()[1..ch.len()]);
    }
    out
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

struct Kill(Child);
impl Drop for Kill {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn wait_port(port: u16) {
    for _ in 0..100 {
        if std::net::TcpStream::connect(("127.0.0.1", port)).is_ok() {
            return;
        }
        std::thread::sleep(std::time::Duration::from_millis(100));
    }
    panic!("nothing listening on {port}");
}

/// Train a small model, write keys and a config, start `weir serve`; returns the server, its
/// address and the keys (claims system, investigator, analyst).
/// (claim id, queue, ground-truth outcome) of each claim sent.
type Decided = Vec<(String, String, String)>;

fn start_weir(dir: &Path) -> (Kill, SocketAddr, [String; 3], Decided) {
    let claims = weir::demo_data::generate(2000, 5);
    let text: Vec<String> = claims.iter().map(|c| c.to_training_json()).collect();
    let mut cfg = weir::config::Config::default();
    cfg.training.trees.enabled = false;
    let loaded = weir::train::load(
        std::io::Cursor::new(text.join("\n")),
        weir::train::BadLines::Refuse,
    )
    .unwrap();
    let trained = weir::train::train(loaded, &cfg, false).unwrap();
    std::fs::write(dir.join("model.json"), trained.artifact.to_json()).unwrap();
    let kf = dir.join("keys.toml");
    let keys = [
        add_key(&kf, "intake", vec![Role::ClaimsSystem]).unwrap(),
        add_key(&kf, "inv-ada", vec![Role::Investigator]).unwrap(),
        add_key(&kf, "ana-ben", vec![Role::Analyst]).unwrap(),
    ];
    let port = free_port();
    let config = dir.join("weir.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nlisten = \"127.0.0.1:{port}\"\n[store]\npath = {:?}\n[paths]\nmodel = {:?}\nrules = {:?}\n[access]\nkey_file = {:?}\n",
            dir.join("store"),
            dir.join("model.json"),
            Path::new(env!("CARGO_MANIFEST_DIR")).join("config/rules.toml"),
            kf
        ),
    )
    .unwrap();
    let child = Command::new(env!("CARGO_BIN_EXE_weir"))
        .args(["serve", "--config", config.to_str().unwrap()])
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(dir.join("serve.log")).unwrap())
        .spawn()
        .unwrap();
    let guard = Kill(child);
    wait_port(port);
    // Claims to work: the last 1,200 demo claims, through the batch intake.
    let mut body = Vec::new();
    for c in &claims[800..] {
        body.extend_from_slice(serde_json::to_string(&c.claim).unwrap().as_bytes());
        body.push(b'\n');
    }
    let addr: SocketAddr = format!("127.0.0.1:{port}").parse().unwrap();
    let rt = tokio::runtime::Runtime::new().unwrap();
    let decided = rt.block_on(async {
        let r = weir::client::Api::new(addr)
            .with_key(&keys[0])
            .request(
                Method::POST,
                "/v1/claims/batch",
                Some("application/x-ndjson"),
                body,
            )
            .await
            .unwrap();
        assert!(r.status.is_success());
        // (claim id, queue, ground-truth outcome) of every claim sent.
        r.body
            .split(|&b| b == b'\n')
            .filter(|l| !l.is_empty())
            .zip(&claims[800..])
            .map(|(line, c)| {
                let v: Value = serde_json::from_slice(line).unwrap();
                assert_eq!(v["claim_id"].as_str(), Some(c.claim.claim_id.as_str()));
                (
                    c.claim.claim_id.clone(),
                    v["queue"].as_str().unwrap().to_string(),
                    c.outcome.as_str().to_string(),
                )
            })
            .collect()
    });
    (guard, addr, keys, decided)
}

#[test]
fn investigator_and_analyst_work_through_the_pages_in_chromium() {
    let driver_bin = std::env::var("CHROMEDRIVER").unwrap_or_else(|_| "chromedriver".into());
    if Command::new(&driver_bin).arg("--version").output().is_err() {
        assert!(
            std::env::var("BROWSER_TEST_REQUIRED").is_err(),
            "chromedriver not found and BROWSER_TEST_REQUIRED is set"
        );
        println!("skipped: no chromedriver (apt-get install chromium chromium-driver)");
        return;
    }
    let dir = std::env::temp_dir().join(format!("weir-browser-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let shots = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/browser");
    std::fs::create_dir_all(&shots).unwrap();
    let (_weir, addr, [_, inv_key, ana_key], decided) = start_weir(&dir);
    let base = format!("http://{addr}");

    let dport = free_port();
    let _chromedriver = Kill(
        Command::new(&driver_bin)
            .arg(format!("--port={dport}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap(),
    );
    wait_port(dport);
    let daddr: SocketAddr = format!("127.0.0.1:{dport}").parse().unwrap();
    let rt = tokio::runtime::Runtime::new().unwrap();
    rt.block_on(async {
        let caps = json!({"capabilities": {"alwaysMatch": {"browserName": "chrome",
            "goog:chromeOptions": {"binary": std::env::var("CHROMIUM").unwrap_or_else(|_| "/usr/bin/chromium".into()),
            "args": ["--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--window-size=1366,1000"]}}}});
        let r = weir::client::request(daddr, None, Method::POST, "/session", Some("application/json"), caps.to_string().into_bytes())
            .await
            .unwrap();
        let v: Value = serde_json::from_slice(&r.body).unwrap();
        let session = v["value"]["sessionId"].as_str().unwrap_or_else(|| panic!("no session: {v}")).to_string();
        let d = Driver { addr: daddr, session };

        let sign_in = |key: String| {
            let d = &d;
            let base = base.clone();
            async move {
                d.goto(&format!("{base}/ui/login")).await;
                d.type_into("#key", &key).await;
                d.click("form[action='/ui/login'] button").await;
            }
        };
        let sign_out = || async { d.click("header form button").await };

        // A page without a session sends the browser to sign in.
        d.goto(&format!("{base}/ui/queues")).await;
        assert!(d.url().await.ends_with("/ui/login"));
        d.assert_accessible_basics("sign-in").await;
        d.type_into("#key", "weir_not-a-key").await;
        d.click("form[action='/ui/login'] button").await;
        d.wait_text("That key is not recognised.").await;

        // The analyst: monitoring, no outcomes yet; the queues are not for this key.
        sign_in(ana_key.clone()).await;
        let before = d.wait_text("adjudicated claims</th><td>0 (0 referral-worthy)").await;
        assert!(d.url().await.ends_with("/ui/monitoring"), "{}", d.url().await);
        assert!(before.contains("A referral is a prompt for human review"));
        d.goto(&format!("{base}/ui/queues")).await;
        d.wait_text("Not for this key").await;
        sign_out().await;
        d.wait_text("API key").await;

        // The investigator: queues, take the next item, the claim, an outcome.
        sign_in(inv_key.clone()).await;
        let queues = d.wait_text("days of work").await;
        assert!(d.url().await.ends_with("/ui/queues"));
        assert!(queues.contains("Investigate") && queues.contains("days of work"));
        assert!(queues.contains("A referral is a prompt for human review"));
        d.assert_accessible_basics("queues").await;
        d.screenshot(&shots.join("queues.png")).await;
        d.click("form[action='/ui/queues/investigate/lease'] button").await;
        let claim = d.wait_text("This claim is now leased to you.").await;
        let claim_url = d.url().await;
        assert!(claim_url.contains("/ui/claims/") && claim_url.ends_with("?taken=1"), "{claim_url}");
        assert!(claim.contains("Why it was referred") && claim.contains("Linked claims"));
        assert!(claim.contains("A referral is a prompt for human review"));
        d.assert_accessible_basics("claim").await;
        d.screenshot(&shots.join("claim.png")).await;
        // Back on the queue page the item shows who holds it.
        d.goto(&format!("{base}/ui/queues")).await;
        d.wait_text("<td>inv-ada</td>").await;
        d.goto(&claim_url).await;
        d.wait_text("Record outcome").await;

        // A wrong amount is refused with its field; nothing is recorded.
        d.click("#outcome option[value='fraud_confirmed']").await;
        d.type_into("#decided_by", "panel-7").await;
        d.type_into("#amount_saved", "twelve hundred").await;
        d.click("form[action$='/outcome'] button").await;
        let refused = d.wait_text("The outcome was not recorded").await;
        assert!(refused.contains("amount saved"), "refusal names the field");
        assert!(refused.contains("No outcome recorded yet."));
        d.type_into("#amount_saved", "1200").await;
        d.click("form[action$='/outcome'] button").await;
        let done = d.wait_text("Outcome recorded.").await;
        assert!(done.contains("Fraud confirmed"), "recorded");
        assert!(done.contains("<td>inv-ada</td>"), "recorded by the key's name");
        // Rings: the ranked list, a ring, and a ring claim's network drawing (both saved to
        // docs/ for the README).
        let docs = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("docs");
        d.goto(&format!("{base}/ui/rings")).await;
        let rings = d.wait_text("How groups are found and ranked").await;
        assert!(rings.contains("A referral is a prompt for human review"));
        assert!(rings.contains("<td class=\"num score\">"), "at least one ring listed");
        d.assert_accessible_basics("rings").await;
        d.screenshot(&docs.join("page-rings.png")).await;
        d.click("table a[href^='/ui/rings/']").await;
        let ring = d.wait_text("Parties that tie these claims").await;
        assert!(ring.contains("class=\"network\"") && ring.contains("<ellipse"), "drawn");
        assert!(ring.contains("Download as GraphML"));
        d.assert_accessible_basics("ring").await;
        d.script("document.querySelector('figure.tl').scrollIntoView(); return true;").await;
        d.screenshot(&shots.join("ring-timeline.png")).await;
        // A member claim's page draws its component too.
        d.click("table a[href^='/ui/claims/']").await;
        let member = d.wait_text("This claim belongs to group").await;
        assert!(member.contains("class=\"network\"") && member.contains("Time line"));
        d.assert_accessible_basics("ring claim").await;
        d.script("document.getElementById('linked').scrollIntoView(); return true;").await;
        d.screenshot(&docs.join("page-ring-network.png")).await;
        d.goto(&format!("{base}/ui/monitoring")).await;
        d.wait_text("Not for this key").await;
        sign_out().await;
        d.wait_text("API key").await;

        // The analyst sees the outcome counted.
        sign_in(ana_key.clone()).await;
        let after = d.wait_text("adjudicated claims</th><td>1 (1 referral-worthy)").await;
        assert!(after.contains("Drift per feature") && after.contains("Referral rates by segment"));
        assert!(after.contains("Champion against challenger") && after.contains("<svg"));
        d.assert_accessible_basics("monitoring").await;

        // The rest of the referred and audited claims get their ground-truth outcomes through
        // the API, as the team would close them; the page follows.
        let api = weir::client::Api::new(addr).with_key(&inv_key);
        let mut posted = 1;
        for (id, queue, outcome) in &decided {
            if queue == "no_review" || claim_url.contains(&format!("/ui/claims/{id}?")) {
                continue;
            }
            let o = json!({"outcome": outcome, "adjudicated_on": "2025-09-01", "decided_by": "panel-7"});
            let r = api.post_json(&format!("/v1/claims/{id}/outcome"), &o).await.unwrap();
            assert!(r.status.is_success(), "{}", String::from_utf8_lossy(&r.body));
            // Only outcomes that say whether the referral was worth it count as adjudicated.
            let label = weir::feedback::Outcome::parse(outcome).and_then(|o| o.label());
            posted += usize::from(label.is_some());
        }
        d.goto(&format!("{base}/ui/monitoring")).await;
        d.wait_text(&format!("adjudicated claims</th><td>{posted} (")).await;
        d.screenshot(&shots.join("monitoring.png")).await;

        // Keyboard: the sign-out button takes focus (a native button, so Tab reaches it).
        let reachable = d
            .script("const b = document.querySelector('header form button'); b.focus(); return document.activeElement === b;")
            .await;
        assert_eq!(reachable, json!(true));
        d.call(Method::DELETE, "", None).await;
    });
    let _ = std::fs::remove_dir_all(&dir);
}
