//! The status page in a real browser: Debian's headless Chromium, driven by Selenium
//! (PyPI) from the reference Python. It draws a trend per loop from history with no
//! console errors, and a mode change made through it with an operator token is recorded
//! under that token's name; a viewer token's attempt shows the API's 403 in words.

use std::path::PathBuf;
use std::time::Duration;

use ridgeline::api::token_sha256;
use ridgeline_tests::{get_json, python_json, wait_until};

use crate::rig::Rig;

const OPERATOR: &str = "page-operator-token-0001";
const VIEWER: &str = "page-viewer-token-0002";

/// `chromedriver` from `PATH` (Debian's `chromium-driver`, beside `chromium`); the test
/// fails without it.
fn chromedriver() -> PathBuf {
    ridgeline_tests::debian_tool("chromedriver", &["chromium", "chromium-driver"])
}

/// Loads the page, waits for a trend per loop, reads the console, then changes the mode
/// with the operator token and tries again with the viewer token.
const SCRIPT: &str = r#"
import json, sys, time
from selenium import webdriver
from selenium.webdriver.chrome.service import Service
from selenium.webdriver.common.by import By
from selenium.webdriver.support.ui import WebDriverWait

url, loops, operator, viewer, driver_path = ARGS
options = webdriver.ChromeOptions()
for arg in ["--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--disable-gpu",
            "--window-size=1400,1800", "--no-first-run", "--disable-extensions"]:
    options.add_argument(arg)
options.binary_location = "/usr/bin/chromium"
options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
driver = webdriver.Chrome(service=Service(driver_path), options=options)
out = {}
try:
    driver.set_page_load_timeout(60)
    driver.get(url)
    driver.execute_script("window.__same_page = 'yes';")
    wait = WebDriverWait(driver, 90, poll_frequency=0.2)

    def points(name):
        return driver.execute_script(
            "const s = document.querySelector('section[data-loop=\"' + arguments[0] + '\"]');"
            "if (!s) return 0;"
            "const l = s.querySelector('[data-role=objective-trend] polyline');"
            "return l ? l.getAttribute('points').trim().split(/\\s+/).length : 0;", name)

    for name in loops:
        wait.until(lambda d: points(name) >= 2)
    out["points"] = {name: points(name) for name in loops}
    out["state_words"] = {
        name: driver.find_element(By.CSS_SELECTOR, f'section[data-loop="{name}"] [data-role=state]').text
        for name in loops}
    out["input_polylines"] = len(driver.find_elements(By.CSS_SELECTOR, "[data-role=input-trend] polyline"))
    out["console_on_load"] = driver.get_log("browser")

    def message(name):
        return driver.find_element(By.CSS_SELECTOR, f'section[data-loop="{name}"] [data-role=message]').text

    name = loops[0]
    field = driver.find_element(By.ID, "token")
    field.clear()
    field.send_keys(operator)
    driver.find_element(By.CSS_SELECTOR, f'section[data-loop="{name}"] button[data-mode=holding]').click()
    wait.until(lambda d: message(name).startswith("Done") or message(name).startswith("Refused"))
    out["operator_message"] = message(name)
    # The page follows the change by itself, without reloading.
    wait.until(lambda d: "HOLDING" in driver.find_element(
        By.CSS_SELECTOR, f'section[data-loop="{name}"] [data-role=state]').text)
    out["state_after"] = driver.find_element(By.CSS_SELECTOR, f'section[data-loop="{name}"] [data-role=state]').text
    out["same_page"] = driver.execute_script("return window.__same_page || null;")
    out["console_after_change"] = driver.get_log("browser")

    field.clear()
    field.send_keys(viewer)
    driver.find_element(By.CSS_SELECTOR, f'section[data-loop="{name}"] button[data-mode=seeking]').click()
    wait.until(lambda d: "403" in message(name))
    out["viewer_message"] = message(name)
    out["console_after_refusal"] = driver.get_log("browser")
    out["cookies"] = driver.get_cookies()
    out["url"] = driver.current_url
finally:
    driver.quit()
print(json.dumps(out))
"#;

fn severe(log: &serde_json::Value) -> Vec<String> {
    log.as_array()
        .expect("a console log")
        .iter()
        .filter(|e| e["level"] == "SEVERE")
        .map(|e| e["message"].as_str().unwrap_or_default().to_owned())
        .collect()
}

#[test]
fn the_status_page_draws_trends_and_changes_the_mode_with_an_operator_token() {
    let driver = chromedriver();
    let tables = format!(
        "[[access]]\nname = \"page-operator\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n\n\
         [[access]]\nname = \"page-wall\"\ntoken_sha256 = \"{}\"\nrole = \"viewer\"\n",
        token_sha256(OPERATOR),
        token_sha256(VIEWER)
    );
    let rig = Rig::new("").with_service("open_reads = true", &tables);
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("the loop has ticked", Duration::from_secs(20), || rig.ticks() > 0);
    let loops: Vec<String> = get_json(rig.api(), "/api/v1/loops")
        .expect("the loops")
        .as_array()
        .expect("a list")
        .iter()
        .map(|l| l["name"].as_str().unwrap().to_owned())
        .collect();
    assert!(!loops.is_empty());

    let args = serde_json::json!([
        format!("http://{}/", rig.api()),
        loops,
        OPERATOR,
        VIEWER,
        driver.display().to_string()
    ]);
    let out = python_json(&SCRIPT.replace("ARGS", &format!("json.loads({:?})", args.to_string())));

    for name in &loops {
        assert!(out["points"][name].as_u64().unwrap() >= 2, "no objective trend for {name}: {out}");
        let words = out["state_words"][name].as_str().unwrap();
        assert!(words.contains("SEEKING"), "state of {name} in words: {words}");
    }
    assert!(out["input_polylines"].as_u64().unwrap() >= 1, "no input trend: {out}");
    // No console errors while loading, drawing and changing the mode.
    assert_eq!(severe(&out["console_on_load"]), Vec::<String>::new(), "console errors on load");
    assert_eq!(severe(&out["console_after_change"]), Vec::<String>::new(), "console errors after the change");
    assert!(out["operator_message"].as_str().unwrap().starts_with("Done"), "{out}");
    assert!(out["state_after"].as_str().unwrap().contains("HOLDING"), "{out}");
    assert_eq!(out["same_page"], "yes", "the page reloaded itself");

    // The change is recorded under the operator token's name.
    let name = &loops[0];
    wait_until("the page's mode change is in history", Duration::from_secs(20), || {
        get_json(rig.api(), &format!("/api/v1/events?loop={name}&limit=50"))
            .and_then(|e| e.as_array().cloned())
            .unwrap_or_default()
            .iter()
            .any(|e| {
                e["kind"] == "mode_changed" && e["actor"] == "page-operator" && e["detail"]["to"] == "holding"
            })
    });

    // The viewer token is refused, and the page says so in words.
    let refusal = out["viewer_message"].as_str().unwrap();
    assert!(refusal.contains("403") && refusal.contains("forbidden"), "{refusal}");
    assert!(refusal.contains("may only read"), "the API's message is shown: {refusal}");
    // The browser's own line for the refused request is the only error it logs.
    for line in severe(&out["console_after_refusal"]) {
        assert!(line.contains("403"), "console error besides the refusal: {line}");
    }
    assert_eq!(status(&rig, name), "holding", "the viewer changed the mode");
    // The token is kept in neither a cookie nor the address.
    assert_eq!(out["cookies"], serde_json::json!([]));
    let url = out["url"].as_str().unwrap();
    assert!(!url.contains(OPERATOR) && !url.contains(VIEWER), "{url}");
}

fn status(rig: &Rig, name: &str) -> String {
    get_json(rig.api(), &format!("/api/v1/loops/{name}")).expect("the loop")["mode"]
        .as_str()
        .unwrap()
        .to_owned()
}
