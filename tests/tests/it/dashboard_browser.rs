//! The dashboard in a real browser: headless Chromium (Debian's package) driven over
//! the Chrome DevTools Protocol, against the real server started in-process with a
//! campaign whose cells were driven to known statuses through the worker API.
//!
//! Checks: the coverage map draws as many cells of each status as the test's own
//! scripted worker produced (and as the server's counters say), with no debug text
//! under it, the counterexample trajectories are drawn, the time axis of the history
//! chart is labelled at round values, the footer carries the caution in full,
//! hovering shows a cell's box, the token from the URL fragment goes to sessionStorage
//! and out of the address bar, a click on Pause (the button's own handler) pauses the
//! campaign as seen through the API, viewers get no working buttons, a bad token gets
//! the login form, and the list page lists the campaign. A screenshot is saved under
//! the cargo target tmp dir.

use serde_json::{json, Value};
use std::io::{BufRead, BufReader};
use std::net::TcpStream;
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};
use tessera_server::auth::Role;
use tungstenite::stream::MaybeTlsStream;
use tungstenite::{Message, WebSocket};

const MAX_DEPTH: i64 = 8;

// ---------------------------------------------------------------- the browser

fn chromium_path() -> PathBuf {
    let path = std::env::var_os("PATH").unwrap_or_default();
    for dir in std::env::split_paths(&path) {
        for name in ["chromium", "chromium-browser"] {
            let p = dir.join(name);
            if p.is_file() {
                return p;
            }
        }
    }
    panic!(
        "headless Chromium is needed for the dashboard browser test but was not found on PATH: \
         install Debian's package with `apt-get install -y chromium` (CI installs it from deploy/ci-packages.txt)"
    );
}

/// A headless Chromium with a fresh profile, and a DevTools connection to its page.
struct Browser {
    child: Child,
    ws: WebSocket<MaybeTlsStream<TcpStream>>,
    next_id: u64,
    _profile: tempfile::TempDir,
}

impl Browser {
    fn launch(url: &str) -> Browser {
        let profile = tempfile::tempdir().expect("temp dir");
        let mut cmd = Command::new(chromium_path());
        cmd.args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--window-size=1400,1250",
            "--remote-debugging-port=0",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg(url)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
        {
            use std::os::unix::process::CommandExt;
            // Its own process group, so that the renderers go when it is killed.
            cmd.process_group(0);
        }
        let mut child = cmd.spawn().unwrap_or_else(|e| {
            panic!("could not start Chromium ({e}); install Debian's package with `apt-get install -y chromium`")
        });
        let stderr = child.stderr.take().expect("stderr");
        let (tx, rx) = mpsc::channel();
        std::thread::spawn(move || {
            // Read the DevTools address, then keep draining so the browser never blocks on a full pipe.
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                if let Some(rest) = line.strip_prefix("DevTools listening on ") {
                    let _ = tx.send(rest.trim().to_string());
                }
            }
        });
        let browser_ws = match rx.recv_timeout(Duration::from_secs(20)) {
            Ok(u) => u,
            Err(_) => {
                kill_group(&mut child);
                panic!("Chromium printed no DevTools address within 20 s");
            }
        };
        // ws://127.0.0.1:PORT/devtools/browser/ID → the page target's own socket.
        let host = browser_ws.trim_start_matches("ws://").split('/').next().expect("host:port").to_string();
        let deadline = Instant::now() + Duration::from_secs(10);
        let page_ws = loop {
            let list: Value = ureq::get(&format!("http://{host}/json/list")).call().expect("DevTools target list").into_json().expect("JSON");
            if let Some(p) = list.as_array().and_then(|a| a.iter().find(|t| t["type"] == "page")) {
                break p["webSocketDebuggerUrl"].as_str().expect("page socket").to_string();
            }
            assert!(Instant::now() < deadline, "no page target in {list}");
            std::thread::sleep(Duration::from_millis(100));
        };
        let (ws, _) = tungstenite::connect(page_ws.as_str()).expect("DevTools websocket");
        if let MaybeTlsStream::Plain(s) = ws.get_ref() {
            s.set_read_timeout(Some(Duration::from_secs(15))).expect("read timeout");
        }
        Browser { child, ws, next_id: 0, _profile: profile }
    }

    /// One DevTools command; returns its `result` (events in between are skipped).
    fn call(&mut self, method: &str, params: Value) -> Value {
        self.next_id += 1;
        let id = self.next_id;
        let msg = json!({"id": id, "method": method, "params": params}).to_string();
        self.ws.send(Message::text(msg)).expect("send to DevTools");
        loop {
            let m = self.ws.read().unwrap_or_else(|e| panic!("DevTools {method}: {e}"));
            let Message::Text(t) = m else { continue };
            let v: Value = serde_json::from_str(t.as_str()).expect("DevTools JSON");
            if v["id"].as_u64() == Some(id) {
                assert!(v.get("error").is_none(), "DevTools {method}: {}", v["error"]);
                return v["result"].clone();
            }
        }
    }

    /// Evaluate `expr` in the page (awaiting a promise) and return its value.
    fn eval(&mut self, expr: &str) -> Value {
        let r = self.call("Runtime.evaluate", json!({"expression": expr, "returnByValue": true, "awaitPromise": true}));
        if let Some(e) = r.get("exceptionDetails") {
            panic!("page threw evaluating {expr}: {e}");
        }
        r["result"]["value"].clone()
    }

    /// Evaluate `expr` until it gives something other than null/false, for at most `secs`.
    fn wait_for(&mut self, expr: &str, secs: u64, what: &str) -> Value {
        let deadline = Instant::now() + Duration::from_secs(secs);
        // While the page is still loading its elements may not exist yet.
        let guarded = format!("(() => {{ try {{ return ({expr}); }} catch (e) {{ return null; }} }})()");
        loop {
            let v = self.eval(&guarded);
            if !(v.is_null() || v == json!(false)) {
                return v;
            }
            if Instant::now() > deadline {
                let status = self.eval("document.getElementById('status-line').textContent");
                let err = self.eval("document.getElementById('login-error').textContent");
                panic!("timed out waiting for {what} ({expr}); status line: {status}; login error: {err}");
            }
            std::thread::sleep(Duration::from_millis(100));
        }
    }

    fn navigate(&mut self, url: &str) {
        self.call("Page.navigate", json!({"url": url}));
    }

    fn screenshot(&mut self, path: &std::path::Path) {
        use base64::Engine;
        let r = self.call("Page.captureScreenshot", json!({"format": "png"}));
        let png = base64::engine::general_purpose::STANDARD.decode(r["data"].as_str().expect("data")).expect("base64");
        assert!(png.starts_with(b"\x89PNG\r\n\x1a\n"), "not a PNG");
        std::fs::write(path, png).expect("write screenshot");
    }
}

fn kill_group(child: &mut Child) {
    // SAFETY: signalling the process group this test created for the browser.
    unsafe {
        libc::kill(-(child.id() as i32), libc::SIGKILL);
    }
    let _ = child.wait();
}

impl Drop for Browser {
    fn drop(&mut self) {
        kill_group(&mut self.child);
    }
}

// ---------------------------------------------------------------- the campaign

struct Api {
    base: String,
}

impl Api {
    fn get(&self, path: &str, token: &str) -> Value {
        ureq::get(&format!("{}{path}", self.base))
            .set("Authorization", &format!("Bearer {token}"))
            .call()
            .unwrap_or_else(|e| panic!("GET {path}: {e}"))
            .into_json()
            .expect("JSON")
    }
    fn post(&self, path: &str, token: &str, body: &Value) -> Value {
        ureq::post(&format!("{}{path}", self.base))
            .set("Authorization", &format!("Bearer {token}"))
            .send_json(body.clone())
            .unwrap_or_else(|e| panic!("POST {path}: {e}"))
            .into_json()
            .expect("JSON")
    }
}

fn spec(model: &str) -> Value {
    json!({
        "name": "dashboard tank",
        "states": [{"name": "h", "unit": "m"}, {"name": "v", "unit": "m/s"}],
        "inputs": [{"name": "q", "unit": "m/s"}],
        "dynamics": {"h": "q - 0.1 * h", "v": "-0.5 * v"},
        "controller": {
            "period": 0.5,
            "observations": [{"name": "level", "expr": "h"}],
            "networks": [format!("sha256:{model}")],
            "selection": {"mode": "single"},
            "decision": "argmax",
            "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.2}}],
            "initial_command": "off"
        },
        "unsafe": [{"all": ["h >= 2"]}],
        "horizon_periods": 20,
        "envelope": {"h": [0.0, 1.0], "v": [-1.0, 1.0]},
        // Cells with a counterexample stay leaves, so the tally below counts them.
        "refinement": {"max_depth": MAX_DEPTH, "split": ["h", "v"], "refine_unsafe": false}
    })
}

/// Whether `step` is 1, 2 or 5 times a power of ten.
fn is_round_step(step: f64) -> bool {
    let p = 10f64.powf(step.log10().floor());
    [1.0, 2.0, 5.0, 10.0].iter().any(|m| ((step / p) - m).abs() < 1e-9)
}

/// What the scripted worker answered, counted by the test itself.
#[derive(Default, Debug)]
struct Tally {
    safe: i64,
    unsafe_: i64,
    unresolved: i64,
    split: i64,
}

/// Scripted verdicts by the cell's box: h's upper end ≤ 0.5 is safe; h ≥ 0.75 with
/// v ≥ 0 is unsafe (with a made-up trajectory that leaves the envelope); anything else
/// inconclusive, which the server splits below max depth and marks unresolved at it.
fn verdict(cell: &Value, max_depth: i64, tally: &mut Tally) -> Value {
    let h = &cell["box"]["h"];
    let v = &cell["box"]["v"];
    let (h0, h1) = (h[0].as_f64().unwrap(), h[1].as_f64().unwrap());
    let v0 = v[0].as_f64().unwrap();
    let depth = cell["depth"].as_i64().unwrap();
    if h1 <= 0.5 {
        tally.safe += 1;
        json!({"verdict": "safe", "reason": "scripted", "split_hint": null, "counterexample": null, "stats": {}})
    } else if h0 >= 0.75 && v0 >= 0.0 {
        tally.unsafe_ += 1;
        let trajectory: Vec<Value> =
            (0..6).map(|k| json!({"t": 0.5 * k as f64, "x": [h0 + 0.25 * k as f64, v0 * 0.8f64.powi(k)]})).collect();
        json!({"verdict": "unsafe", "reason": "scripted: reaches h >= 2", "split_hint": null,
               "counterexample": {"trajectory": trajectory, "commands": vec!["on"; 6]}, "stats": {}})
    } else {
        if depth >= max_depth {
            tally.unresolved += 1;
        } else {
            tally.split += 1;
        }
        let dim = if depth % 2 == 0 { "h" } else { "v" };
        json!({"verdict": "inconclusive", "reason": "scripted", "split_hint": {"dim": dim, "score": 1.0},
               "counterexample": null, "stats": {}})
    }
}

#[test]
fn dashboard_draws_the_coverage_map_and_pauses_in_a_real_browser() {
    let _slow = tessera_tests::slow_test();
    let chromium = chromium_path(); // fail first, and clearly, when the browser is missing
    let t0 = Instant::now();
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let dir = tempfile::tempdir().expect("temp dir");
    let server = rt
        .block_on(tessera_server::start(tessera_server::Config::for_tests(dir.path().join("tessera.sqlite"))))
        .expect("server starts");
    let token = |r: Role| rt.block_on(server.state.store.create_token(r, "browser test")).expect("token");
    let (sub, work, viewer) = (token(Role::Submitter), token(Role::Worker), token(Role::Viewer));
    let api = Api { base: server.url() };

    // A campaign on two split states, driven through the worker API.
    let model_bytes = tessera_server::model_check::testing::tiny_model(1, 2, "dashboard");
    let model: Value = ureq::post(&format!("{}/api/v1/models", api.base))
        .set("Authorization", &format!("Bearer {sub}"))
        .send_bytes(&model_bytes)
        .expect("upload model")
        .into_json()
        .unwrap();
    let model = model["sha256"].as_str().unwrap().to_string();
    let created = api.post("/api/v1/campaigns?initial_depth=2", &sub, &spec(&model));
    let id = created["id"].as_str().unwrap().to_string();
    let mut tally = Tally::default();
    // Small rounds (cells are leased shallowest first) until the first cells at max
    // depth come back unresolved: the rest of that deepest tier is still pending.
    for round in 0.. {
        assert!(round < 200, "the scripted campaign should reach max depth: {tally:?}");
        if tally.unresolved > 0 {
            break;
        }
        let leases = api.post("/api/v1/leases", &work, &json!({"max": 8, "worker": "scripted"}));
        let results: Vec<Value> = leases["leases"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| json!({"lease_id": c["lease_id"], "elapsed_ms": 1.0, "result": verdict(c, MAX_DEPTH, &mut tally)}))
            .collect();
        if results.is_empty() {
            break;
        }
        let r = api.post("/api/v1/results", &work, &json!({"worker": "scripted", "engine_version": "scripted-1", "results": results}));
        assert_eq!(r["rejected"], 0, "{r}");
    }
    // Three cells leased and not answered: shown as being checked.
    let held = api.post("/api/v1/leases", &work, &json!({"max": 3, "worker": "slow"}));
    let leased = held["leases"].as_array().unwrap().len() as i64;
    let summary = api.get(&format!("/api/v1/campaigns/{id}"), &viewer);
    let cells = &summary["cells"];
    // Leaves: 4 initial, +1 per split; pending is what is neither decided nor leased.
    let leaves = 4 + tally.split;
    let pending = leaves - tally.safe - tally.unsafe_ - tally.unresolved - leased;
    let expected = json!({
        "safe": tally.safe, "counterexample": tally.unsafe_, "unresolved": tally.unresolved,
        "pending": pending, "leased": leased, "failed": 0, "total": leaves,
    });
    for s in ["safe", "counterexample", "unresolved", "pending", "leased", "failed"] {
        assert_eq!(cells[s], expected[s], "server counter for {s} against the scripted tally {tally:?}");
    }
    for s in ["safe", "counterexample", "unresolved", "pending", "leased"] {
        assert!(expected[s].as_i64().unwrap() > 0, "the scenario should show some {s} cells: {expected}");
    }
    // Spread the results' times over 713 s, so that the history chart's time axis
    // runs in minutes over a span whose even quarters are not round (2.97 min).
    rt.block_on(async {
        let pool = &server.state.store.pool;
        let (lo, hi, first): (i64, i64, i64) =
            sqlx::query_as("SELECT MIN(rowid), MAX(rowid), MIN(received_at) FROM results").fetch_one(pool).await.unwrap();
        sqlx::query("UPDATE results SET received_at = ?1 + (rowid - ?2) * 713000 / ?3")
            .bind(first)
            .bind(lo)
            .bind((hi - lo).max(1))
            .execute(pool)
            .await
            .unwrap();
    });

    // The campaign page, logged in by a token in the URL fragment.
    let page = format!("{}/dashboard/campaigns/{id}", api.base);
    let mut b = Browser::launch(&format!("{page}#token={sub}"));
    let drawn = b.wait_for(
        &format!(
            "(() => {{ const d = document.getElementById('map').dataset.drawn; if (!d) return null; \
               const v = JSON.parse(d); return v.counterexamples === {} ? v : null; }})()",
            tally.unsafe_
        ),
        15,
        "the map with every counterexample",
    );
    for s in ["safe", "counterexample", "unresolved", "pending", "leased", "total"] {
        assert_eq!(drawn[s], expected[s], "cells drawn with status {s}: page drew {drawn}, expected {expected}");
    }
    assert_eq!(drawn["failed"], 0, "{drawn}");
    // The drawing counts are for tests only: no debug line of them on the page.
    let page_text = b.eval("document.body.innerText").as_str().unwrap().to_string();
    assert!(!page_text.contains("{\"total\"") && !page_text.contains("\"counterexamples\":"), "debug output on the page: {page_text}");
    assert_eq!(b.eval("document.getElementById('drawn')"), Value::Null);
    assert_eq!(b.eval("sessionStorage.getItem('tessera.token')"), json!(sub), "token kept in sessionStorage");
    assert_eq!(b.eval("location.hash"), json!(""), "token removed from the address bar");
    assert_eq!(b.eval("localStorage.length"), json!(0));
    assert_eq!(b.eval("document.getElementById('who').textContent"), json!("role: submitter"));
    let footer = b.eval("document.querySelector('footer').textContent.replace(/\\s+/g, ' ').trim()");
    assert_eq!(footer, json!(tessera_engine::caution::CAUTION), "the caution in full, from its one source");
    let traj_note = b.eval("document.getElementById('traj-note').textContent");
    assert!(traj_note.as_str().unwrap().starts_with(&format!("{} trajectories", tally.unsafe_)), "{traj_note}");
    let legend = b.eval("document.getElementById('map-legend').textContent");
    for label in ["proven safe", "holds a counterexample", "unresolved", "pending"] {
        assert!(legend.as_str().unwrap().contains(label), "legend: {legend}");
    }
    assert!(!legend.as_str().unwrap().contains("unsafe"), "legend: {legend}");
    // The history chart ends at the coverage.
    let cov = api.get(&format!("/api/v1/campaigns/{id}/coverage"), &viewer);
    let note = b.wait_for("document.getElementById('history-note').textContent || null", 5, "the history chart");
    let safe_pct = format!("{:.2} % proven safe", 100.0 * cov["statuses"]["safe"]["fraction"].as_f64().unwrap());
    assert!(note.as_str().unwrap().starts_with(&format!("Now: {safe_pct}")), "{note} vs {safe_pct}");
    // Its time axis: 713 s is 11.9 minutes, labelled at round values 0, 5, 10 (a step
    // of 1, 2 or 5 × 10^k, 3 to 6 labels; common practice for axis ticks).
    let ticks = b.wait_for(
        "(() => { const t = document.getElementById('history').dataset.ticks; return t ? JSON.parse(t) : null; })()",
        5,
        "the history chart's ticks",
    );
    assert_eq!(ticks["unit"], "minutes", "{ticks}");
    let step = ticks["step"].as_f64().unwrap();
    assert!(is_round_step(step), "{ticks}");
    let labels: Vec<&str> = ticks["labels"].as_array().unwrap().iter().map(|l| l.as_str().unwrap()).collect();
    assert!((3..=6).contains(&labels.len()), "{ticks}");
    for (k, l) in labels.iter().enumerate() {
        assert!((l.parse::<f64>().unwrap() - k as f64 * step).abs() < 1e-9, "label {l} is not {k} × {step}: {ticks}");
    }
    assert_eq!(labels, ["0", "5", "10"], "{ticks}");
    // Recent results list the newest results.
    let recent = b.eval("document.querySelectorAll('#recent tbody tr').length");
    assert_eq!(recent, json!(15));

    // Hover over h = 0.1, v = 0 (the safe half) with a real mouse event.
    let rect = b.eval("(() => { const r = document.getElementById('map').getBoundingClientRect(); return [r.left, r.top]; })()");
    let (left, top) = (rect[0].as_f64().unwrap(), rect[1].as_f64().unwrap());
    // Plot area of the 560 px map: 56 px left margin, 486 px wide; 10 px top margin, 510 px high.
    let (x, y) = (left + 56.0 + 0.1 * 486.0, top + 10.0 + 0.5 * 510.0 + 10.0);
    b.call("Input.dispatchMouseEvent", json!({"type": "mouseMoved", "x": x, "y": y}));
    let hover = b.wait_for("(() => { const h = document.getElementById('hover'); return h.hidden ? null : h.textContent; })()", 5, "the hover box");
    let hover = hover.as_str().unwrap().to_string();
    assert!(hover.starts_with("proven safe"), "{hover}");
    assert!(hover.contains("h ∈ [") && hover.contains("v ∈ ["), "{hover}");

    // Pause by clicking the page's own button; the API then says paused.
    assert_eq!(b.eval("document.getElementById('btn-pause').disabled"), json!(false));
    assert_eq!(b.eval("document.getElementById('btn-resume').disabled"), json!(true));
    b.eval("document.getElementById('btn-pause').click()");
    let deadline = Instant::now() + Duration::from_secs(5);
    loop {
        let state = api.get(&format!("/api/v1/campaigns/{id}"), &viewer)["state"].clone();
        if state == "paused" {
            break;
        }
        assert!(Instant::now() < deadline, "the campaign is still {state} after the pause click");
        std::thread::sleep(Duration::from_millis(100));
    }
    b.wait_for("document.getElementById('c-state').textContent === 'paused'", 5, "the page to show paused");
    b.wait_for("document.getElementById('btn-resume').disabled === false", 5, "resume to become available");
    let shot = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("dashboard-campaign.png");
    b.screenshot(&shot);
    println!("screenshot of the campaign page: {}", shot.display());

    // A viewer sees the same map but no working buttons.
    b.navigate(&format!("{page}#token={viewer}"));
    b.wait_for("document.getElementById('who').textContent === 'role: viewer'", 10, "the viewer's role");
    b.wait_for("!!document.getElementById('map').dataset.drawn", 10, "the viewer's map");
    b.wait_for("document.getElementById('action-note').textContent.includes('viewer')", 10, "the viewer's note");
    for btn in ["btn-pause", "btn-resume", "btn-cancel"] {
        let usable = b.eval(&format!("(() => {{ const e = document.getElementById('{btn}'); return !e.hidden && !e.disabled; }})()"));
        assert_eq!(usable, json!(false), "{btn} usable by a viewer");
    }
    let note = b.eval("document.getElementById('action-note').textContent");
    assert!(note.as_str().unwrap().contains("viewer"), "{note}");

    // The list page, as the viewer.
    b.navigate(&format!("{}/dashboard", api.base));
    let row = b.wait_for(
        "(() => { const r = document.querySelector('#campaigns tbody tr'); return r ? r.textContent : null; })()",
        10,
        "the campaign list",
    );
    let row = row.as_str().unwrap();
    assert!(row.contains("dashboard tank") && row.contains("paused"), "{row}");
    assert!(row.contains(&model[..12]), "model hash shown: {row}");
    let shot_list = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("dashboard-list.png");
    b.screenshot(&shot_list);
    println!("screenshot of the campaign list: {}", shot_list.display());

    // A bad token gets the login form, and the stored token is dropped.
    b.navigate(&format!("{page}#token=tsr_not_a_token"));
    b.wait_for("document.getElementById('login-view').hidden === false", 10, "the login form");
    assert_eq!(b.eval("sessionStorage.getItem('tessera.token')"), Value::Null);
    assert_eq!(b.eval("document.getElementById('campaign-view').hidden"), json!(true));

    drop(b);
    rt.block_on(server.stop()).expect("server stops");
    println!("dashboard browser test with {} in {:.1} s", chromium.display(), t0.elapsed().as_secs_f64());
}

/// Drive every pending cell of the running campaigns with `rule` (box → verdict word).
fn drive_all(api: &Api, work: &str, rule: fn(f64, f64, f64, f64) -> &'static str) {
    loop {
        let leases = api.post("/api/v1/leases", work, &json!({"max": 64, "worker": "scripted"}));
        let cells = leases["leases"].as_array().unwrap().clone();
        if cells.is_empty() {
            return;
        }
        let results: Vec<Value> = cells
            .iter()
            .map(|c| {
                let iv = |k: &str, i: usize| c["box"][k][i].as_f64().unwrap();
                let verdict = match rule(iv("h", 0), iv("h", 1), iv("v", 0), iv("v", 1)) {
                    "safe" => json!({"verdict": "safe", "reason": "scripted"}),
                    "unsafe" => json!({"verdict": "unsafe", "reason": "scripted", "counterexample": {"commands": ["on"]}}),
                    _ => json!({"verdict": "inconclusive", "reason": "scripted", "split_hint": null}),
                };
                json!({"lease_id": c["lease_id"], "result": verdict})
            })
            .collect();
        let r = api.post("/api/v1/results", work, &json!({"worker": "scripted", "results": results}));
        assert_eq!(r["rejected"], 0, "{r}");
    }
}

/// The changes view of a follow-up: the page draws as many pieces of each kind of
/// change as the server's diff lists, with a legend and the table of transitions.
#[test]
fn dashboard_draws_the_changes_of_a_follow_up() {
    let _slow = tessera_tests::slow_test();
    let _chromium = chromium_path();
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let dir = tempfile::tempdir().expect("temp dir");
    let server = rt
        .block_on(tessera_server::start(tessera_server::Config::for_tests(dir.path().join("tessera.sqlite"))))
        .expect("server starts");
    let token = |r: Role| rt.block_on(server.state.store.create_token(r, "browser test")).expect("token");
    let (sub, work, viewer) = (token(Role::Submitter), token(Role::Worker), token(Role::Viewer));
    let api = Api { base: server.url() };
    let upload = |tag: &str| -> String {
        let bytes = tessera_server::model_check::testing::tiny_model(1, 2, tag);
        let m: Value = ureq::post(&format!("{}/api/v1/models", api.base))
            .set("Authorization", &format!("Bearer {sub}"))
            .send_bytes(&bytes)
            .expect("upload model")
            .into_json()
            .unwrap();
        m["sha256"].as_str().unwrap().to_string()
    };
    let mut s = spec(&upload("before"));
    s["refinement"]["max_depth"] = json!(4);
    let a = api.post("/api/v1/campaigns", &sub, &s)["id"].as_str().unwrap().to_string();
    // Before: the lower half of h is safe, the rest unresolved at max depth.
    drive_all(&api, &work, |_, h1, _, _| if h1 <= 0.5 { "safe" } else { "inconclusive" });
    let mut s = spec(&upload("after"));
    s["refinement"]["max_depth"] = json!(4);
    let b = api.post(&format!("/api/v1/campaigns?follow_up={a}"), &sub, &s)["id"].as_str().unwrap().to_string();
    // Now: h ≤ 1/2 with v ≥ 0 unsafe (v < 0 still safe), h ≥ 3/4 newly safe, the rest as before.
    drive_all(&api, &work, |h0, h1, v0, v1| {
        if h1 <= 0.5 {
            if v0 >= 0.0 {
                "unsafe"
            } else if v1 <= 0.0 {
                "safe"
            } else {
                "inconclusive"
            }
        } else if h0 >= 0.75 {
            "safe"
        } else {
            "inconclusive"
        }
    });
    let ch = api.get(&format!("/api/v1/campaigns/{b}/changes?rows=50000"), &viewer);
    assert_eq!(ch["final"], true, "{ch}");
    let statuses: Vec<&str> = ch["statuses"].as_array().unwrap().iter().map(|s| s.as_str().unwrap()).collect();
    let mut expected: std::collections::BTreeMap<&str, i64> =
        ["same", "still-safe", "newly-safe", "lost-safe", "safe-counterexample"].iter().map(|k| (*k, 0)).collect();
    for r in ch["rows"].as_array().unwrap() {
        let (f, t) = (statuses[r[0].as_u64().unwrap() as usize], statuses[r[1].as_u64().unwrap() as usize]);
        let kind = match (f == "safe", t) {
            (true, "safe") => "still-safe",
            (true, "counterexample") => "safe-counterexample",
            (true, _) => "lost-safe",
            (false, "safe") => "newly-safe",
            _ => "same",
        };
        *expected.get_mut(kind).unwrap() += 1;
    }
    for k in ["same", "still-safe", "newly-safe", "safe-counterexample"] {
        assert!(expected[k] > 0, "the scenario should show some '{k}' pieces: {expected:?}");
    }
    let expected = serde_json::to_value(&expected).unwrap();

    let mut br = Browser::launch(&format!("{}/dashboard/campaigns/{b}#token={viewer}", api.base));
    let drawn = br.wait_for(
        "(() => { const d = document.getElementById('changes-map').dataset.drawn; return d ? JSON.parse(d) : null; })()",
        15,
        "the changes map",
    );
    assert_eq!(drawn, expected, "pieces drawn per kind of change");
    assert_eq!(br.eval("document.getElementById('changes-view').hidden"), json!(false));
    let rows = br.eval("document.querySelectorAll('#changes-table tbody tr').length");
    assert_eq!(rows, json!(ch["transitions"].as_array().unwrap().len()));
    let table = br.eval("document.getElementById('changes-table').textContent").as_str().unwrap().to_string();
    assert!(table.contains(ch["summary"]["safe_to_counterexample"]["reduced"].as_str().unwrap()), "{table}");
    let legend = br.eval("document.getElementById('changes-legend').textContent");
    assert!(legend.as_str().unwrap().contains("was safe, now in a counterexample cell"), "{legend}");
    assert_eq!(br.eval("document.getElementById('ch-against').textContent"), json!(a));
    br.eval("document.getElementById('changes-view').scrollIntoView()");
    let shot = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("dashboard-changes.png");
    br.screenshot(&shot);
    println!("screenshot of the changes view: {}", shot.display());
    drop(br);
    rt.block_on(server.stop()).expect("server stops");
}

/// Benchmark, not run by default (`cargo test -p tessera-tests --test it dashboard_browser::
/// -- --ignored --nocapture`): the campaign page with about 100,000 leaf cells. Prints
/// how long the page took to fetch and draw the map and to answer a hover; fails only
/// if the map does not show every leaf.
#[test]
#[ignore]
fn benchmark_dashboard_with_100k_cells() {
    let _slow = tessera_tests::slow_test();
    let _ = chromium_path();
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let dir = tempfile::tempdir().expect("temp dir");
    let server = rt
        .block_on(tessera_server::start(tessera_server::Config::for_tests(dir.path().join("tessera.sqlite"))))
        .expect("server starts");
    let token = |r: Role| rt.block_on(server.state.store.create_token(r, "browser bench")).expect("token");
    let (sub, work) = (token(Role::Submitter), token(Role::Worker));
    let api = Api { base: server.url() };
    let model: Value = ureq::post(&format!("{}/api/v1/models", api.base))
        .set("Authorization", &format!("Bearer {sub}"))
        .send_bytes(&tessera_server::model_check::testing::tiny_model(1, 2, "bench"))
        .expect("upload model")
        .into_json()
        .unwrap();
    let mut s = spec(model["sha256"].as_str().unwrap());
    s["refinement"]["max_depth"] = json!(24);
    let t = Instant::now();
    let id = api.post("/api/v1/campaigns?initial_depth=16", &sub, &s)["id"].as_str().unwrap().to_string();
    println!("created a campaign with 65536 leaves in {:.1} s", t.elapsed().as_secs_f64());
    let t = Instant::now();
    let leaves = |api: &Api| {
        let c = api.get(&format!("/api/v1/campaigns/{id}"), &sub)["cells"].clone();
        ["pending", "leased", "safe", "counterexample", "unresolved", "failed"].iter().map(|k| c[*k].as_i64().unwrap()).sum::<i64>()
    };
    let mut tally = Tally::default();
    while leaves(&api) < 100_000 {
        let l = api.post("/api/v1/leases", &work, &json!({"max": 256, "worker": "bench"}));
        let results: Vec<Value> = l["leases"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| json!({"lease_id": c["lease_id"], "result": verdict(c, 24, &mut tally)}))
            .collect();
        assert!(!results.is_empty());
        api.post("/api/v1/results", &work, &json!({"worker": "bench", "results": results}));
    }
    let n = leaves(&api);
    println!("drove it to {n} leaves in {:.1} s ({tally:?})", t.elapsed().as_secs_f64());
    // Past the page's 10 s overlap window, so that its incremental polls find no change.
    std::thread::sleep(Duration::from_secs(11));

    let t = Instant::now();
    let mut b = Browser::launch(&format!("{}/dashboard/campaigns/{id}#token={sub}", api.base));
    let drawn = b.wait_for(
        &format!("(() => {{ const v = JSON.parse(document.getElementById('map').dataset.drawn); return v.total === {n} ? v : null; }})()"),
        120,
        "the map with every leaf",
    );
    println!("page open to map drawn: {:.2} s wall clock; drawn {drawn}", t.elapsed().as_secs_f64());
    let first = b.eval("JSON.parse(document.getElementById('map').dataset.timing)");
    println!("first (full) load: fetch+parse {} ms, draw {} ms", first["load_ms"], first["draw_ms"]);
    let inc = b.wait_for("(() => { const t = JSON.parse(document.getElementById('map').dataset.timing); return t.full === false ? t : null; })()", 20, "an incremental poll");
    println!("incremental poll (nothing changed): fetch {} ms", inc["load_ms"]);
    let rect = b.eval("(() => { const r = document.getElementById('map').getBoundingClientRect(); return [r.left, r.top]; })()");
    let (left, top) = (rect[0].as_f64().unwrap(), rect[1].as_f64().unwrap());
    for k in 0..5 {
        let x = left + 56.0 + (0.1 + 0.2 * k as f64) * 486.0;
        b.call("Input.dispatchMouseEvent", json!({"type": "mouseMoved", "x": x, "y": top + 200.0}));
        std::thread::sleep(Duration::from_millis(100));
        let t = b.eval("JSON.parse(document.getElementById('map').dataset.timing).hover_ms");
        println!("hover at h = {:.1}: {t} ms", 0.1 + 0.2 * k as f64);
    }
    let shot = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("dashboard-100k.png");
    b.screenshot(&shot);
    println!("screenshot: {}", shot.display());
    drop(b);
    rt.block_on(server.stop()).expect("server stops");
}
