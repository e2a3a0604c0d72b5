//! The HTML report in a real browser: headless Chromium (Debian's chromium and
//! chromium-driver, which the test installs when they are missing) driven through
//! chromedriver's WebDriver protocol (W3C WebDriver, https://www.w3.org/TR/webdriver2/).
//! The page must render: a sane height, every image decoded (naturalWidth > 0), one table
//! row per phase, the plots present, and no errors on the console.

mod common;

use std::path::Path;
use std::process::{Child, Command, Stdio};

use serde_json::{json, Value};

struct Driver {
    child: Child,
    base: String,
}

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn start_driver() -> Driver {
    let port = free_port();
    let child = Command::new("chromedriver")
        .arg(format!("--port={port}"))
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("chromedriver runs");
    // The driver is killed and waited for when it drops, whatever happens next.
    let d = Driver {
        child,
        base: format!("http://127.0.0.1:{port}"),
    };
    for _ in 0..100 {
        if ureq::get(&format!("{}/status", d.base)).call().is_ok() {
            return d;
        }
        std::thread::sleep(std::time::Duration::from_millis(100));
    }
    panic!("chromedriver did not answer on port {port}");
}

fn post(url: &str, body: Value) -> Value {
    match ureq::post(url).send_json(body) {
        Ok(r) => r.into_json().unwrap(),
        Err(ureq::Error::Status(code, r)) => {
            panic!(
                "{url}: HTTP {code}: {}",
                r.into_string().unwrap_or_default()
            )
        }
        Err(e) => panic!("{url}: {e}"),
    }
}

/// Opens `page` headless at `width × height`; returns (session URL, driver).
fn open(page: &Path, width: u32, height: u32, profile: &Path) -> (String, Driver) {
    let d = start_driver();
    let caps = json!({"capabilities": {"alwaysMatch": {
        "browserName": "chrome",
        "goog:chromeOptions": {
            "binary": "/usr/bin/chromium",
            "args": ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                     "--disable-quic", "--no-first-run", "--disable-component-update", "--disable-sync",
                     format!("--user-data-dir={}", profile.display()),
                     format!("--window-size={width},{height}")]
        },
        "goog:loggingPrefs": {"browser": "ALL"}
    }}});
    let s = post(&format!("{}/session", d.base), caps);
    let id = s["value"]["sessionId"]
        .as_str()
        .expect("a session")
        .to_string();
    let session = format!("{}/session/{id}", d.base);
    post(
        &format!("{session}/url"),
        json!({"url": format!("file://{}", page.display())}),
    );
    (session, d)
}

#[test]
fn report_renders_in_headless_chromium() {
    common::provide::provide(
        &["chromium", "chromedriver"],
        &["chromium", "chromium-driver"],
    );
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let sample = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-maps");
    let r = common::modalmap(&[
        "map",
        sample.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--calibrate",
        "Cu6Sn5 (eta)",
        "--calibrate",
        "Ag3Sn",
        "--quiet",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let page = out.join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();
    // Self-contained: nothing fetched over the network, no script.
    for fetch in ["src=\"http", "href=\"http", "url(http", "@import"] {
        assert!(!html.contains(fetch), "the page fetches something: {fetch}");
    }
    assert!(!html.contains("<script"), "no script needed to read it");

    let (session, _driver) = open(&page, 1200, 900, &tmp.path().join("profile"));
    let probe = post(
        &format!("{session}/execute/sync"),
        json!({"script": "return {height: document.body.scrollHeight, \
            images: Array.from(document.images).map(i => [i.complete, i.naturalWidth, i.alt.length]), \
            rows: document.querySelectorAll('#phases tbody tr').length, \
            svgs: document.querySelectorAll('svg').length, \
            titled: document.querySelectorAll('svg > title').length};", "args": []}),
    )["value"]
        .clone();
    let report: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
    let phases = report["phases"].as_array().unwrap().len();
    let height = probe["height"].as_f64().unwrap();
    assert!((1500.0..30000.0).contains(&height), "page height {height}");
    let images = probe["images"].as_array().unwrap();
    assert!(
        images.len() >= 6,
        "phase map, BSE, overlay and 3 element maps: {images:?}"
    );
    for i in images {
        assert_eq!(i[0], true, "image not loaded: {i}");
        assert!(i[1].as_u64().unwrap() > 0, "image not decoded: {i}");
        assert!(i[2].as_u64().unwrap() > 0, "image without alt text: {i}");
    }
    assert_eq!(
        probe["rows"].as_u64().unwrap() as usize,
        phases,
        "one row per phase"
    );
    let svgs = probe["svgs"].as_u64().unwrap();
    assert!(
        svgs >= 5,
        "area bar, compositions, pair plots, BSE and phase-count plots: {svgs}"
    );
    assert_eq!(
        probe["titled"].as_u64().unwrap(),
        svgs,
        "every plot has a title"
    );
    // No errors on the console (chromedriver's log endpoint).
    let logs = post(&format!("{session}/se/log"), json!({"type": "browser"}));
    let errors: Vec<&Value> = logs["value"]
        .as_array()
        .map(|v| v.iter().filter(|e| e["level"] == "SEVERE").collect())
        .unwrap_or_default();
    assert!(errors.is_empty(), "console errors: {errors:?}");
    // A screenshot decodes as a PNG of the window size.
    let shot = ureq::get(&format!("{session}/screenshot"))
        .call()
        .unwrap()
        .into_json::<Value>()
        .unwrap();
    use base64::Engine as _;
    let png = base64::engine::general_purpose::STANDARD
        .decode(shot["value"].as_str().unwrap())
        .unwrap();
    let info = png::Decoder::new(std::io::Cursor::new(&png))
        .read_info()
        .expect("the screenshot is a PNG")
        .info()
        .clone();
    assert!(
        info.width >= 800 && info.height >= 600,
        "{}×{}",
        info.width,
        info.height
    );
    if let Ok(dest) = std::env::var("MODALMAP_SCREENSHOT") {
        std::fs::write(dest, &png).unwrap();
    }
    let _ = ureq::delete(&session).call();
}
