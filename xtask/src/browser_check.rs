//! `cargo xtask browser`: the crane demo's `report.html` in a real browser.
//! Runs `visviva run` twice on a copy of `models-demo/crane-sway` (the
//! second run carries the change block), opens the page in headless
//! Chromium through WebDriver (the distribution's `chromium` and
//! `chromium-driver`, installed when missing) and checks: no horizontal
//! overflow at 1280 px, every chart has drawn paths and spans the column,
//! every table cell with a digit carries its JSON path and every tagged
//! value matches `report.json`, and the page printed on A4 has no table
//! wider than the printable width. Saves a screenshot and the PDF under
//! `target/browser-check/` (`--save-screenshot` also writes the README's
//! `docs/report-screenshot.png`).

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use serde_json::Value;

use crate::webdriver::Browser;

/// The README's screenshot.
pub const SCREENSHOT: &str = "docs/report-screenshot.png";

/// A4 printable width at 96 px per inch with 1 cm margins: 19 cm.
const A4_PRINT_WIDTH_PX: f64 = 19.0 / 2.54 * 96.0;

/// Copy the demo project (logs and settings) to `dst`; an `out/` of an
/// earlier check stays, so `visviva run` reuses what its hashes allow.
fn copy_demo(src: &Path, dst: &Path) -> Result<()> {
    std::fs::create_dir_all(dst.join("data"))
        .with_context(|| format!("creating {}", dst.display()))?;
    std::fs::copy(src.join("visviva.toml"), dst.join("visviva.toml"))?;
    for e in std::fs::read_dir(src.join("data"))? {
        let e = e?;
        std::fs::copy(e.path(), dst.join("data").join(e.file_name()))?;
    }
    Ok(())
}

/// Run the demo `name` twice and return its `out/` folder.
fn make_report(root: &Path, work: &Path, name: &str) -> Result<PathBuf> {
    let exe = crate::tools::build_visviva(root)?;
    let project = work.join(name);
    copy_demo(&root.join("models-demo").join(name), &project)?;
    for _ in 0..2 {
        let st = std::process::Command::new(&exe)
            .args(["run", "--quiet"])
            .arg(&project)
            .stdout(std::process::Stdio::null())
            .status()
            .context("starting visviva run")?;
        if !st.success() {
            bail!("visviva run {} failed ({st})", project.display());
        }
    }
    Ok(project.join("out"))
}

/// The page's value for a tagged span shows report.json's value: digits
/// (thousands separators dropped) over the factor `data-x`, within half a
/// unit of the last shown digit; strings equal; null as "-".
fn shows(text: &str, factor: f64, value: &Value) -> bool {
    match value {
        Value::Number(n) => {
            let digits = text.trim().replace(',', "");
            let Ok(shown) = digits.parse::<f64>() else {
                return false;
            };
            let (mantissa, exp) = match digits.split_once(['e', 'E']) {
                Some((m, e)) => (m, e.parse::<i32>().unwrap_or(0)),
                None => (digits.as_str(), 0),
            };
            let decimals = mantissa.split_once('.').map_or(0, |(_, d)| d.len()) as i32;
            let half = 0.5 * 10f64.powi(exp - decimals);
            let v = n.as_f64().unwrap_or(f64::NAN) * factor;
            (shown - v).abs() <= half * (1.0 + 1e-9) + 1e-12 * v.abs()
        }
        Value::Null => text.trim() == "-",
        Value::Bool(b) => text.trim() == if *b { "yes" } else { "no" },
        Value::String(s) => text == s,
        _ => false,
    }
}

const OVERFLOW_JS: &str = "const w = document.documentElement.clientWidth;
const wide = Array.from(document.querySelectorAll('body *'))
  .filter(e => e.getBoundingClientRect().right > w + 0.5)
  .filter(e => !(e.parentElement && e.parentElement.getBoundingClientRect().right > w + 0.5));
return {scroll: document.documentElement.scrollWidth, client: w, inner: window.innerWidth,
  wide: wide.map(e => e.tagName + ' ' + Math.round(e.getBoundingClientRect().right) + ' px: '
    + e.outerHTML.slice(0, 160))};";

const CHARTS_JS: &str = "const st = getComputedStyle(document.body);
const col = document.body.clientWidth - parseFloat(st.paddingLeft) - parseFloat(st.paddingRight);
return Array.from(document.querySelectorAll('figure svg')).map(s => ({
  title: s.querySelector('text') ? s.querySelector('text').textContent : '',
  drawn: Array.from(s.querySelectorAll('path')).filter(p => p.getTotalLength() > 0).length
       + s.querySelectorAll('circle').length,
  width: s.getBoundingClientRect().width, column: col}));";

const CELLS_JS: &str = "const bad = [];
for (const td of document.querySelectorAll('table td')) {
  const c = td.cloneNode(true);
  c.querySelectorAll('[data-k], .label').forEach(e => e.remove());
  if (/[0-9]/.test(c.textContent)) bad.push(td.textContent);
}
const tags = Array.from(document.querySelectorAll('[data-k]'))
  .map(e => [e.dataset.k, e.textContent, e.dataset.x || '1']);
return {bad: bad, tags: tags};";

/// No horizontal overflow and no table, figure or block wider than the page.
fn check_overflow(b: &Browser, what: &str, max_width: f64) -> Result<usize> {
    let v = b.execute(OVERFLOW_JS)?;
    let (scroll, client) = (
        v["scroll"].as_f64().unwrap_or(0.0),
        v["client"].as_f64().unwrap_or(0.0),
    );
    println!("browser: {what}: page width {scroll} px in a {client} px viewport");
    let wide = v["wide"].as_array().map_or(0, Vec::len);
    if wide > 0 {
        bail!(
            "{what}: {wide} element(s) wider than the page: {:#}",
            v["wide"]
        );
    }
    if scroll > client || client > max_width + 1.0 {
        bail!("{what}: horizontal overflow: scroll width {scroll} px, viewport {client} px (max {max_width:.0})");
    }
    Ok(scroll as usize)
}

/// Every chart has drawn paths and spans at least 95 % of the column.
fn check_charts(b: &Browser) -> Result<usize> {
    let v = b.execute(CHARTS_JS)?;
    let charts = v.as_array().cloned().unwrap_or_default();
    if charts.len() < 4 {
        bail!("only {} charts on the page", charts.len());
    }
    for c in &charts {
        let (drawn, w, col) = (
            c["drawn"].as_u64().unwrap_or(0),
            c["width"].as_f64().unwrap_or(0.0),
            c["column"].as_f64().unwrap_or(1.0),
        );
        println!(
            "browser: chart \"{}\": {drawn} drawn elements, {w:.0} of {col:.0} px",
            c["title"].as_str().unwrap_or("")
        );
        if drawn == 0 || w < 0.95 * col {
            bail!("chart {} not drawn or narrower than the column", c["title"]);
        }
    }
    Ok(charts.len())
}

/// Every digit in a table cell is a tagged value, and every tagged value
/// shows report.json's.
fn check_numbers(b: &Browser, report: &Value) -> Result<usize> {
    let v = b.execute(CELLS_JS)?;
    if let Some(bad) = v["bad"].as_array().filter(|a| !a.is_empty()) {
        bail!(
            "{} table cell(s) with untagged digits: {:?}",
            bad.len(),
            bad
        );
    }
    let tags = v["tags"].as_array().cloned().unwrap_or_default();
    let mut wrong = Vec::new();
    for t in &tags {
        let (key, text) = (t[0].as_str().unwrap_or(""), t[1].as_str().unwrap_or(""));
        let factor: f64 = t[2]
            .as_str()
            .and_then(|x| x.parse().ok())
            .unwrap_or(f64::NAN);
        let value = report.pointer(&format!("/{key}")).unwrap_or(&Value::Null);
        if !shows(text, factor, value) {
            wrong.push(format!("{key}: page {text:?} (x{factor}), report {value}"));
        }
    }
    if !wrong.is_empty() {
        bail!(
            "{} value(s) differ from report.json:\n  {}",
            wrong.len(),
            wrong.join("\n  ")
        );
    }
    Ok(tags.len())
}

/// Print layout: at the A4 printable width with print styles, nothing is
/// wider than the page; then the PDF itself.
fn check_print(b: &Browser, out: &Path) -> Result<usize> {
    b.cdp(
        "Emulation.setEmulatedMedia",
        serde_json::json!({"media": "print"}),
    )?;
    let w = A4_PRINT_WIDTH_PX.floor() as u32;
    b.cdp(
        "Emulation.setDeviceMetricsOverride",
        serde_json::json!({"width": w, "height": 1000, "deviceScaleFactor": 1, "mobile": false}),
    )?;
    check_overflow(
        b,
        "print layout at the A4 printable width",
        A4_PRINT_WIDTH_PX,
    )?;
    b.cdp(
        "Emulation.clearDeviceMetricsOverride",
        serde_json::json!({}),
    )?;
    b.cdp(
        "Emulation.setEmulatedMedia",
        serde_json::json!({"media": ""}),
    )?;
    let pdf = b.print_a4()?;
    if !pdf.starts_with(b"%PDF") {
        bail!("print did not give a PDF");
    }
    // Page objects ("/Type /Page", not the "/Pages" tree) and their size:
    // A4 is 595.28 x 841.89 pt (ISO 216; 72 pt per inch).
    let text = String::from_utf8_lossy(&pdf);
    let pages = text
        .match_indices("/Type /Page")
        .filter(|(i, m)| !text[i + m.len()..].starts_with('s'))
        .count();
    let a4 = text.matches("/MediaBox [0 0 595").count();
    if pages == 0 || a4 != pages {
        bail!("the PDF has {pages} page(s), {a4} of them A4");
    }
    std::fs::write(out.join("report.pdf"), &pdf)?;
    Ok(pages)
}

/// The demos whose pages are checked: a conservative and a damped,
/// driven one (the first gives the README's screenshot).
const DEMOS: [&str; 2] = ["crane-sway", "servo-drivetrain"];

/// Run the check; `save` also writes the README's screenshot.
pub fn run(save: bool) -> Result<bool> {
    let root = crate::workspace_root();
    crate::tools::ensure_package("chromium", "chromium chromium-driver")?;
    crate::tools::ensure_package("chromedriver", "chromium-driver")?;
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"));
    for (k, demo) in DEMOS.iter().enumerate() {
        let work = target.join("browser-check").join(demo);
        check_page(&root, &work, demo, save && k == 0)?;
    }
    Ok(true)
}

/// Make and check one demo's page.
fn check_page(root: &Path, work: &Path, demo: &str, save: bool) -> Result<()> {
    println!("browser: {demo}");
    let out = make_report(root, work, demo)?;
    let report: Value = serde_json::from_slice(&std::fs::read(out.join("report.json"))?)?;
    let page = std::fs::canonicalize(out.join("report.html"))?;
    let b = Browser::start(1280, 900)?;
    b.goto(&format!("file://{}", page.display()))?;
    check_overflow(&b, "screen at 1280 px", 1280.0)?;
    let charts = check_charts(&b)?;
    let tags = check_numbers(&b, &report)?;
    b.resize(1280, 1400)?;
    let png = b.screenshot()?;
    std::fs::write(work.join("report.png"), &png)?;
    if save {
        std::fs::create_dir_all(root.join("docs"))?;
        std::fs::write(root.join(SCREENSHOT), &png)?;
        println!("browser: wrote {SCREENSHOT}");
    }
    let pages = check_print(&b, work)?;
    drop(b);
    println!(
        "browser check {demo}: no overflow at 1280 px, {charts} charts drawn, {tags} tagged values equal report.json, {pages} A4 page(s) with no table wider than the page; {}",
        work.display()
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shown_values_are_read_back_with_their_factor() {
        let v = serde_json::json!(0.000104);
        assert!(shows("104", 1e6, &v));
        assert!(!shows("105", 1e6, &v));
        assert!(shows("65,536", 1.0, &serde_json::json!(65536)));
        assert!(shows("2.26e4", 100.0, &serde_json::json!(226.17)));
        assert!(shows("-", 1.0, &Value::Null));
    }
}
