//! A small W3C WebDriver client over plain HTTP (`ureq`, `serde_json`) for
//! the distribution's `chromedriver`: start the driver on a free port in a
//! process group of its own, open one headless Chromium session, navigate,
//! run scripts, take screenshots, print to PDF. Dropping the [`Browser`]
//! deletes the session and stops the driver and every Chromium process it
//! started, by process-group id.

use std::process::{Child, Command, Stdio};
use std::time::Duration;

use anyhow::{anyhow, bail, Context, Result};
use base64::Engine as _;
use serde_json::{json, Value};

/// A running chromedriver with one session.
pub struct Browser {
    driver: Child,
    base: String,
    session: Option<String>,
    agent: ureq::Agent,
}

/// A free TCP port on the loopback interface (bound, then released).
fn free_port() -> Result<u16> {
    let l = std::net::TcpListener::bind("127.0.0.1:0").context("finding a free port")?;
    Ok(l.local_addr()?.port())
}

impl Browser {
    /// Start `chromedriver` and a headless Chromium session with a
    /// `width` x `height` window.
    pub fn start(width: u32, height: u32) -> Result<Self> {
        use std::os::unix::process::CommandExt as _;
        let port = free_port()?;
        let driver = Command::new("chromedriver")
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .process_group(0)
            .spawn()
            .context("starting chromedriver")?;
        let agent = ureq::AgentBuilder::new()
            .timeout(Duration::from_secs(120))
            .build();
        let mut b = Self {
            driver,
            base: format!("http://127.0.0.1:{port}"),
            session: None,
            agent,
        };
        b.wait_ready()?;
        let caps = json!({"capabilities": {"alwaysMatch": {
            "browserName": "chrome",
            "goog:chromeOptions": {
                "binary": "/usr/bin/chromium",
                "args": ["--headless=new", "--no-sandbox", "--disable-gpu",
                         "--hide-scrollbars", format!("--window-size={width},{height}")]
            }
        }}});
        let v = b.call("POST", "/session", Some(caps))?;
        let id = v["sessionId"]
            .as_str()
            .ok_or_else(|| anyhow!("no session id in {v}"))?;
        b.session = Some(id.to_string());
        Ok(b)
    }

    /// Poll `/status` until the driver accepts sessions (about 10 s at most).
    fn wait_ready(&mut self) -> Result<()> {
        for _ in 0..100 {
            if let Some(st) = self.driver.try_wait()? {
                bail!("chromedriver exited at start ({st})");
            }
            let ready = self
                .agent
                .get(&format!("{}/status", self.base))
                .call()
                .ok()
                .and_then(|r| r.into_json::<Value>().ok())
                .is_some_and(|v| v["value"]["ready"] == true);
            if ready {
                return Ok(());
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        bail!("chromedriver did not become ready")
    }

    /// One WebDriver command; returns its `value`.
    fn call(&self, method: &str, path: &str, body: Option<Value>) -> Result<Value> {
        let url = format!("{}{path}", self.base);
        let req = self.agent.request(method, &url);
        let resp = match body {
            Some(b) => req.send_json(b),
            None => req.call(),
        };
        let v: Value = match resp {
            Ok(r) => r.into_json()?,
            Err(ureq::Error::Status(code, r)) => {
                let text = r.into_string().unwrap_or_default();
                bail!("{method} {path}: HTTP {code}: {text}")
            }
            Err(e) => return Err(anyhow!("{method} {path}: {e}")),
        };
        Ok(v["value"].clone())
    }

    fn session_path(&self, rest: &str) -> Result<String> {
        let id = self.session.as_ref().ok_or_else(|| anyhow!("no session"))?;
        Ok(format!("/session/{id}{rest}"))
    }

    /// Open `url`.
    pub fn goto(&self, url: &str) -> Result<()> {
        self.call(
            "POST",
            &self.session_path("/url")?,
            Some(json!({"url": url})),
        )?;
        Ok(())
    }

    /// Run `script` (a function body) and return its result.
    pub fn execute(&self, script: &str) -> Result<Value> {
        self.call(
            "POST",
            &self.session_path("/execute/sync")?,
            Some(json!({"script": script, "args": []})),
        )
    }

    /// Set the window's outer size.
    pub fn resize(&self, width: u32, height: u32) -> Result<()> {
        self.call(
            "POST",
            &self.session_path("/window/rect")?,
            Some(json!({"width": width, "height": height})),
        )?;
        Ok(())
    }

    /// A Chrome DevTools command through chromedriver's `goog/cdp/execute`.
    pub fn cdp(&self, cmd: &str, params: Value) -> Result<Value> {
        self.call(
            "POST",
            &self.session_path("/goog/cdp/execute")?,
            Some(json!({"cmd": cmd, "params": params})),
        )
    }

    /// PNG of the viewport.
    pub fn screenshot(&self) -> Result<Vec<u8>> {
        let v = self.call("GET", &self.session_path("/screenshot")?, None)?;
        decode(&v)
    }

    /// The page printed to PDF on A4 (21.0 x 29.7 cm) with 1 cm margins.
    pub fn print_a4(&self) -> Result<Vec<u8>> {
        let v = self.call(
            "POST",
            &self.session_path("/print")?,
            Some(json!({
                "page": {"width": 21.0, "height": 29.7},
                "margin": {"top": 1.0, "bottom": 1.0, "left": 1.0, "right": 1.0},
                "background": true,
                "shrinkToFit": false
            })),
        )?;
        decode(&v)
    }
}

fn decode(v: &Value) -> Result<Vec<u8>> {
    let text = v.as_str().ok_or_else(|| anyhow!("expected base64 text"))?;
    Ok(base64::engine::general_purpose::STANDARD.decode(text)?)
}

impl Drop for Browser {
    fn drop(&mut self) {
        if let Ok(path) = self.session_path("") {
            let _ = self.call("DELETE", &path, None);
        }
        // chromedriver leads its own process group (Chromium's processes
        // included): stop the group by its id, then reap the driver.
        let pgid = self.driver.id();
        let _ = Command::new("kill")
            .args(["-TERM", "--", &format!("-{pgid}")])
            .status();
        let _ = self.driver.kill();
        let _ = self.driver.wait();
    }
}
