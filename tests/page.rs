//! The status page in a real browser: a store seeded with two sessions' batches at injected
//! times over the last 40 minutes (one drops from the good demo system to the dictionary
//! fallback for its last 10 minutes), a real `mtgauge serve` on it, headless Chromium (Debian
//! `chromium`) loads `GET /`: the DOM lists both sessions with one chart point per minute that
//! had segments, and a third session's external metric with its mean, and a screenshot is
//! written to the test output directory.

mod common;

use std::process::Command;
use std::sync::Arc;

use common::{temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::metric::resample::Resampling;
use mtgauge::metric::scores::corpus_score;
use mtgauge::metric::{Metric, ScoreConfig};
use mtgauge::refs::compiled::Scratch;
use mtgauge::refs::RefSet;
use mtgauge::session::{ItemKey, Session, SessionSpec};
use mtgauge::store::{BatchWrite, Store};

fn chromium() -> Option<&'static str> {
    let found = ["chromium", "/usr/bin/chromium"].into_iter().find(|c| Command::new(c).arg("--version").output().is_ok_and(|o| o.status.success()));
    if found.is_none() {
        // CI exports MTGAUGE_REQUIRE_CHROMIUM=1 (.ci/run installs Debian's chromium).
        assert!(std::env::var("MTGAUGE_REQUIRE_CHROMIUM").as_deref() != Ok("1"), "chromium is required (MTGAUGE_REQUIRE_CHROMIUM=1) but not found");
        eprintln!("chromium not found: page test skipped");
    }
    found
}

fn browse(bin: &str, profile: &std::path::Path, extra: &[&str], url: &str) -> std::process::Output {
    let mut c = Command::new(bin);
    c.args(["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking", "--disable-component-update", "--disable-sync"]);
    c.arg(format!("--user-data-dir={}", profile.display())).args(extra).arg(url);
    c.output().expect("run chromium")
}

/// Seed `dir` with the demo reference set and two sessions; returns, per session, the number of
/// minutes with segments in the last hour and its score over its recent window.
fn seed(dir: &std::path::Path, now: i64) -> Vec<(String, usize, f64)> {
    let set = Arc::new(RefSet::new(demo_segments()).unwrap());
    let store = Store::open(dir).unwrap();
    store.put_refset("ferry", &set).unwrap();
    let systems = demo_systems();
    let (good, poor) = (&systems[0], &systems[2]);
    let mut out = Vec::new();
    for (name, drop_at) in [("ferry-v8", None), ("ferry-v8-canary", Some(30))] {
        let labels = [("route".to_string(), "tarnholm".to_string())].into();
        let spec = SessionSpec { name: name.into(), refset: "ferry".into(), config: ScoreConfig::default(), labels, window: 200, resampling: Resampling::default(), target_language: None, guard_settings: Vec::new(), external: Default::default() };
        store.put_session(&spec, &set.digest_hex(), now - 3000).unwrap();
        let session = Session::new(spec, Arc::clone(&set), now - 3000);
        let mut scratch = Scratch::default();
        let start = (now / 60) * 60 - 40 * 60;
        let mut minutes = 0;
        for m in 0..40i64 {
            if m % 7 == 3 {
                continue; // a quiet minute: no point
            }
            minutes += 1;
            let system = if drop_at.is_some_and(|d| m >= d) { poor } else { good };
            let outcomes: Vec<_> = (0..25).map(|k| ((m * 25 + k) as usize) % set.len()).map(|i| session.score_item(ItemKey::Id(set.segment(i).id()), &system.hypotheses[i], &mut scratch)).collect();
            let applied = session.apply_at(start + m * 60 + 5, "seed", m as u64 + 1, &outcomes, 0, None, &Default::default()).unwrap();
            store.commit_batches(&[BatchWrite { session: name, applied: &applied }]).unwrap();
        }
        let recent = corpus_score(&session.state().window.stats(), &ScoreConfig::default(), Metric::Bleu).unwrap();
        out.push((name.to_string(), minutes, recent));
    }
    out
}

/// A third session, `tarnholm-qe`, with an external metric `qe` (0..1): values over 10 of the
/// last 40 minutes, written as the daemon's group commit writes them. Returns the minutes with
/// values and the mean of every value sent.
fn seed_external(dir: &std::path::Path, now: i64) -> (usize, f64) {
    use mtgauge::external::{Declaration, ExternalSpec};
    let set = Arc::new(RefSet::new(demo_segments()).unwrap());
    let store = Store::open(dir).unwrap();
    let external = Declaration::new(vec![ExternalSpec::new("qe", 0.0, 1.0).unwrap()]).unwrap();
    let spec = SessionSpec { name: "tarnholm-qe".into(), refset: "ferry".into(), config: ScoreConfig::default(), labels: Default::default(), window: 200, resampling: Resampling::default(), target_language: None, guard_settings: Vec::new(), external };
    store.put_session(&spec, &set.digest_hex(), now - 3000).unwrap();
    let session = Session::new(spec, set, now - 3000);
    let start = (now / 60) * 60 - 40 * 60;
    let mut sent = Vec::new();
    for m in 0..10i64 {
        let t = start + m * 4 * 60 + 5;
        let values: Vec<f64> = (0..5).map(|k| 0.4 + 0.01 * (m * 5 + k) as f64).collect();
        let items: Vec<_> = values.iter().enumerate().map(|(k, v)| ((m * 5) as u64 + k as u64, session.spec().external.check_item([("qe", *v)]).unwrap())).collect();
        sent.extend(values);
        let mut applied = session.apply_at(t, "seed", m as u64 + 1, &[], 0, None, &Default::default()).unwrap();
        let d = session.external_delta(&items).unwrap();
        applied.external_rows = Some(session.apply_external(&d).unwrap());
        applied.external_history = Some(session.record_external(t, &d.totals).unwrap());
        let (copy, ids) = session.external_durable();
        (applied.external, applied.external_window) = (Some(copy), Some(ids));
        store.commit_batches(&[BatchWrite { session: "tarnholm-qe", applied: &applied }]).unwrap();
    }
    (10, sent.iter().sum::<f64>() / sent.len() as f64)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn status_page_in_headless_chromium() {
    let Some(bin) = chromium() else { return };
    let dir = temp_dir("page");
    let data = dir.join("data");
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() as i64;
    let seeded = seed(&data, now);
    let (qe_minutes, qe_mean) = seed_external(&data, now);
    // A floor between the two sessions' recent scores, for both (by label): the canary, all
    // fallback output in its recent window, falls under it; the other does not.
    let (good, poor) = (seeded[0].2, seeded[1].2);
    assert!(good > poor + 10.0, "the seeded drop: {good} vs {poor}");
    let floor = ((good + poor) / 2.0).round();
    let config = dir.join("mtgauge.toml");
    std::fs::write(&config, format!("alert_eval_seconds = 1\n\n[[alert]]\nname = \"floor\"\nlabels = {{ route = \"tarnholm\" }}\nwhen = \"below\"\nthreshold = {floor}\nmin_segments = 100\nfor_segments = 0\n")).unwrap();
    let server = Server::start(&["--data-dir", data.to_str().unwrap(), "--config", config.to_str().unwrap()]);
    server.wait_serving().await;
    let url = format!("http://{}/", server.metrics);
    // Wait for the evaluator to fire on the canary (it evaluates every second).
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    loop {
        let body = reqwest_free_get(&server.metrics, "/api/v1/overview");
        let v: serde_json::Value = serde_json::from_str(body.split("\r\n\r\n").nth(1).unwrap()).unwrap();
        if v["sessions"][1]["alert_spans"].as_array().is_some_and(|a| !a.is_empty()) {
            assert_eq!(v["sessions"][1]["alert_spans"][0]["rule"], "floor");
            assert!(v["sessions"][0]["alert_spans"].as_array().unwrap().is_empty(), "the good session does not fire: {}", v["sessions"][0]);
            break;
        }
        assert!(std::time::Instant::now() < deadline, "the floor rule never fired on the canary: {v}");
        tokio::time::sleep(std::time::Duration::from_millis(300)).await;
    }

    let out_dir = std::path::PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("page");
    std::fs::create_dir_all(&out_dir).unwrap();
    let dom = browse(bin, &dir.join("profile-dom"), &["--dump-dom"], &url);
    assert!(dom.status.success(), "{}", String::from_utf8_lossy(&dom.stderr));
    let dom = String::from_utf8_lossy(&dom.stdout).to_string();
    std::fs::write(out_dir.join("page.html"), &dom).unwrap();
    for (name, minutes, _) in &seeded {
        let at = dom.find(&format!("data-session=\"{name}\"")).unwrap_or_else(|| panic!("session {name} listed"));
        let card = &dom[at..dom[at..].find("</section>").map_or(dom.len(), |e| at + e)];
        assert!(card.contains("<svg"), "{name}: chart present");
        assert_eq!(card.matches("class=\"pt\"").count(), *minutes, "{name}: one point per minute with segments");
        assert!(card.contains("class=\"band\""), "{name}: confidence band");
        assert!(card.contains("route=tarnholm"), "{name}: labels");
        assert!(card.contains(&format!("class=\"threshold\" data-rule=\"floor\" data-value=\"{floor}\"")), "{name}: the floor's threshold line");
        assert!(card.contains("class=\"rate\""), "{name}: segments per second");
        let spans = card.matches("class=\"alert-span\" data-rule=\"floor\" data-state=\"firing\"").count();
        assert_eq!(spans, usize::from(name == "ferry-v8-canary"), "{name}: the span where the alert fires");
    }
    // The session with an external metric lists its mean since start (recomputed here from
    // the values sent) and charts its mean per minute.
    let at = dom.find("data-session=\"tarnholm-qe\"").expect("the session with an external metric listed");
    let card = &dom[at..dom[at..].find("</section>").map_or(dom.len(), |e| at + e)];
    let row = card.split("<tr data-metric=\"qe\">").nth(1).expect("a row for qe");
    assert!(row.contains(&format!("<td class=\"ext-cum\">{qe_mean:.3}")), "{row}");
    let chart = card.split("class=\"ext-chart\"").nth(1).expect("the external chart");
    assert_eq!(chart.matches("class=\"pt\"").count(), qe_minutes, "one point per minute with values");
    // The comparison view: the first two comparable sessions, the canary worse.
    let at = dom.find("id=\"compare\"").expect("comparison view");
    let cmp = &dom[at..];
    assert!(cmp.contains("<option selected=\"\">ferry-v8</option>") || cmp.contains("<option selected>ferry-v8</option>"), "A chosen: {}", &cmp[..cmp.len().min(600)]);
    let diff: f64 = cmp.split("class=\"diff\" data-difference=\"").nth(1).unwrap().split('"').next().unwrap().parse().unwrap();
    assert!((diff - (good - poor)).abs() < 15.0 && diff > 0.0, "ferry-v8 - canary on the shared segments: {diff} (recent {good} vs {poor})");
    assert!(cmp.contains("A better"), "the interval of the difference lies above 0");
    // The drop shows: the canary's last points lie lower on the chart (larger y) than its
    // first ones.
    let at = dom.find("data-session=\"ferry-v8-canary\"").unwrap();
    let ys: Vec<f64> = dom[at..].split("class=\"pt\"").skip(1).take(seeded[1].1).map(|p| p.split("cy=\"").nth(1).unwrap().split('"').next().unwrap().parse().unwrap()).collect();
    let (first, last) = (ys[..5].iter().sum::<f64>() / 5.0, ys[ys.len() - 5..].iter().sum::<f64>() / 5.0);
    assert!(last > first + 20.0, "drop visible: first {first}, last {last}");

    let shot = out_dir.join("status-page.png");
    let _ = std::fs::remove_file(&shot);
    let s = browse(bin, &dir.join("profile-shot"), &[&format!("--screenshot={}", shot.display()), "--window-size=1400,1060"], &url);
    assert!(s.status.success(), "{}", String::from_utf8_lossy(&s.stderr));
    let png = std::fs::read(&shot).expect("screenshot written");
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n", "PNG signature (PNG specification, ISO/IEC 15948)");
    eprintln!("screenshot: {}", shot.display());

    // The JSON the page refreshes from lists the same sessions.
    let body = reqwest_free_get(&server.metrics, "/api/v1/overview");
    let v: serde_json::Value = serde_json::from_str(body.split("\r\n\r\n").nth(1).unwrap()).unwrap();
    let names: Vec<&str> = v["sessions"].as_array().unwrap().iter().map(|s| s["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["ferry-v8", "ferry-v8-canary", "tarnholm-qe"]);
    // Longer ranges: a day by 20-minute steps, one point per step the seeded minutes fall in.
    let start = (now / 60) * 60 - 40 * 60;
    let mut steps: Vec<i64> = (0..40i64).filter(|m| m % 7 != 3).map(|m| (start + m * 60 + 5) / 1200).collect();
    steps.dedup();
    let body = reqwest_free_get(&server.metrics, "/api/v1/overview?range=24h");
    let v: serde_json::Value = serde_json::from_str(body.split("\r\n\r\n").nth(1).unwrap()).unwrap();
    assert_eq!(v["range"], "24h");
    let with: Vec<i64> = v["sessions"][1]["points"].as_array().unwrap().iter().filter(|p| p["segments"].as_u64() > Some(0)).map(|p| p["start"].as_i64().unwrap() / 1200).collect();
    assert_eq!(with, steps, "one point per 20-minute step with segments");
    assert_eq!(v["sessions"][1]["html"].as_str().unwrap().matches("class=\"pt\"").count(), steps.len());
    assert!(v["sessions"][1]["html"].as_str().unwrap().contains("per 20 minutes, last 24 hours"), "the chart says its range");
    // The comparison the view refreshes from, the other way round: negative, with an interval
    // below 0.
    let body = reqwest_free_get(&server.metrics, "/api/v1/compare?a=ferry-v8-canary&b=ferry-v8");
    let v: serde_json::Value = serde_json::from_str(body.split("\r\n\r\n").nth(1).unwrap()).unwrap();
    let bleu = &v["metrics"]["bleu"];
    assert!((bleu["difference"].as_f64().unwrap() + diff).abs() < 1e-9, "{v}");
    assert!(bleu["interval"]["high"].as_f64().unwrap() < 0.0, "{v}");
    let body = reqwest_free_get(&server.metrics, "/api/v1/compare?a=ferry-v8&b=nope");
    assert!(body.contains("\"error\"") && body.contains("nope"), "{body}");
}

/// A plain HTTP/1.1 GET over a TCP socket.
fn reqwest_free_get(addr: &str, path: &str) -> String {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    write!(s, "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    out
}

/// `mtgauge report`: the same chart as a standalone SVG file (and as a PNG image), read back with a real XML parser
/// (xml.etree.ElementTree of Python's standard library, on expat; Python 3.11.7 here): well-formed, titled, with axis captions, the
/// footer's proxy note and configuration, and one point per minute with segments.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn report_writes_the_chart_as_an_svg_file() {
    let dir = temp_dir("report");
    let data = dir.join("data");
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() as i64;
    let seeded = seed(&data, now);
    let server = Server::start(&["--data-dir", data.to_str().unwrap()]);
    server.wait_serving().await;
    let out = dir.join("canary.svg");
    let run = |args: &[&str]| Command::new(env!("CARGO_BIN_EXE_mtgauge")).arg("report").args(["--server", &server.grpc]).args(args).output().unwrap();
    let r = run(&["--session", "ferry-v8-canary", "--since", "1h", "--step", "1m", "--out", out.to_str().unwrap()]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let script = "import json, sys, xml.etree.ElementTree as ET\n\
root = ET.parse(sys.argv[1]).getroot()\n\
ns = '{http://www.w3.org/2000/svg}'\n\
texts = [t.text or '' for t in root.iter(ns + 'text')]\n\
pts = [c for c in root.iter(ns + 'circle') if c.get('class') == 'pt']\n\
print(json.dumps({'root': root.tag, 'title': root.find(ns + 'title').text, 'texts': texts, 'points': len(pts), 'bands': sum(1 for p in root.iter(ns + 'polygon') if p.get('class') == 'band')}))";
    let py = Command::new("python3").args(["-c", script, out.to_str().unwrap()]).output().unwrap();
    assert!(py.status.success(), "not well-formed XML: {}", String::from_utf8_lossy(&py.stderr));
    let v: serde_json::Value = serde_json::from_slice(&py.stdout).unwrap();
    assert_eq!(v["root"], "{http://www.w3.org/2000/svg}svg");
    assert!(v["title"].as_str().unwrap().starts_with("BLEU of ferry-v8-canary"), "{}", v["title"]);
    let texts: Vec<&str> = v["texts"].as_array().unwrap().iter().map(|t| t.as_str().unwrap()).collect();
    let all = texts.join(" "); // footer lines are wrapped: read them as one text
    for want in ["BLEU of session ferry-v8-canary", "BLEU (0\u{2013}100)", "time (UTC)", "UTC", "comparable only under the same tokenizer", "tokenizer=nist"] {
        assert!(all.contains(want), "{want:?} in {texts:?}");
    }
    assert_eq!(v["points"].as_u64(), Some(seeded[1].1 as u64), "one point per minute with segments");
    assert!(v["bands"].as_u64().unwrap() >= 1, "a confidence band");
    // The same chart as a PNG: the signature, the size (twice the SVG's), and at each point of
    // the SVG a pixel of the line's colour (#2e4a3f) in the image.
    let png_out = dir.join("canary.png");
    let r = run(&["--session", "ferry-v8-canary", "--since", "1h", "--step", "1m", "--until", &now.to_string(), "--out", png_out.to_str().unwrap()]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let svg_again = dir.join("canary-again.svg");
    let r = run(&["--session", "ferry-v8-canary", "--since", "1h", "--step", "1m", "--until", &now.to_string(), "--out", svg_again.to_str().unwrap()]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let bytes = std::fs::read(&png_out).unwrap();
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "PNG signature (PNG specification, ISO/IEC 15948)");
    let img = resvg::tiny_skia::Pixmap::decode_png(&bytes).expect("a PNG that decodes");
    let svg = std::fs::read_to_string(&svg_again).unwrap();
    let dim = |attr: &str| -> f64 { svg.split(&format!(" {attr}=\"")).nth(1).unwrap().split('"').next().unwrap().parse().unwrap() };
    assert_eq!((img.width(), img.height()), ((2.0 * dim("width")) as u32, (2.0 * dim("height")) as u32));
    let pts: Vec<(f64, f64)> = svg.split("class=\"pt\"").skip(1).map(|p| {
        let a = |k: &str| -> f64 { p.split(&format!("{k}=\"")).nth(1).unwrap().split('"').next().unwrap().parse().unwrap() };
        (a("cx"), a("cy"))
    }).collect();
    assert_eq!(pts.len(), seeded[1].1);
    for (cx, cy) in &pts {
        // The chart sits at (20, 50) in the report, one unit per unit; two pixels per unit.
        let (x, y) = ((2.0 * (20.0 + cx)) as u32, (2.0 * (50.0 + cy)) as u32);
        let c = img.pixel(x, y).unwrap().demultiply();
        let near = |v: u8, want: u8| (i16::from(v) - i16::from(want)).abs() <= 24;
        assert!(near(c.red(), 0x2e) && near(c.green(), 0x4a) && near(c.blue(), 0x3f), "point at ({cx}, {cy}): pixel {:?}", (c.red(), c.green(), c.blue()));
    }
    // Errors: one line on stderr, exit 2, and no file written.
    let png = dir.join("x.gif");
    for (args, want) in [
        (vec!["--session", "ferry-v8-canary", "--out", png.to_str().unwrap()], "must end in .svg or .png"),
        (vec!["--session", "no-such", "--out", png.with_extension("svg").to_str().unwrap()], "NotFound"),
        (vec!["--session", "ferry-v8-canary", "--metric", "meteor", "--out", png.with_extension("svg").to_str().unwrap()], "meteor"),
    ] {
        let r = run(&args);
        let err = String::from_utf8_lossy(&r.stderr);
        assert_eq!(r.status.code(), Some(2), "{args:?}: {err}");
        assert_eq!(err.lines().count(), 1, "{args:?}: one line: {err}");
        assert!(err.contains(want), "{args:?}: {want:?} in {err}");
    }
    assert!(!png.exists() && !png.with_extension("svg").exists(), "no file on error");
}
