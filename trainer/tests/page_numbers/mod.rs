//! The report page's numbers read back from its text, without the page's
//! own formatter: each `<span data-k="KEY">TEXT</span>` is parsed to a
//! number and must equal report.json's value at KEY to within half a unit
//! of the last digit the page shows (so the page rounds the file's number
//! correctly, whatever formatting it chose).

use serde_json::Value;

/// (key, page text) for every tagged number, read from the HTML here.
pub fn spans(html: &str) -> Vec<(String, String)> {
    let open = "<span data-k=\"";
    html.split(open)
        .skip(1)
        .filter_map(|rest| {
            let (key, after) = rest.split_once('"')?;
            let (_, body) = after.split_once('>')?;
            let (text, _) = body.split_once("</span>")?;
            let text = text
                .replace("&lt;", "<")
                .replace("&gt;", ">")
                .replace("&amp;", "&");
            Some((key.to_string(), text))
        })
        .collect()
}

/// Half a unit of the last digit of a decimal or scientific number text.
fn half_unit(text: &str) -> f64 {
    let (mantissa, exp) = match text.split_once(['e', 'E']) {
        Some((m, e)) => (m, e.parse::<i32>().unwrap_or(0)),
        None => (text, 0),
    };
    let decimals = mantissa.split_once('.').map_or(0, |(_, d)| d.len()) as i32;
    0.5 * 10f64.powi(exp - decimals)
}

/// Whether the page text shows `value`.
fn shows(text: &str, value: &Value) -> bool {
    match value {
        Value::Number(n) => {
            let Ok(shown) = text.trim().parse::<f64>() else {
                return false;
            };
            if n.is_i64() || n.is_u64() {
                return shown == n.as_f64().unwrap();
            }
            let v = n.as_f64().unwrap();
            (shown - v).abs() <= half_unit(text.trim()) * (1.0 + 1e-9)
        }
        Value::Null => text == "-",
        Value::Bool(b) => text == if *b { "yes" } else { "no" },
        Value::String(s) => text == s,
        _ => false,
    }
}

/// Tagged numbers whose page text does not show report.json's value:
/// (key, page text, report value).
pub fn disagreements(html: &str, report: &Value) -> Vec<(String, String, String)> {
    spans(html)
        .into_iter()
        .filter_map(|(key, text)| {
            let value = report.pointer(&format!("/{key}")).unwrap_or(&Value::Null);
            (!shows(&text, value)).then(|| (key, text, value.to_string()))
        })
        .collect()
}

#[test]
fn reading_back_catches_a_wrong_digit() {
    let json: Value = serde_json::json!({"a": 0.123456, "b": 12345.0, "c": 3, "d": null});
    let page = "<span data-k=\"a\">0.1235</span><span data-k=\"b\">1.235e4</span>\
                <span data-k=\"c\">3</span><span data-k=\"d\">-</span>";
    assert!(disagreements(page, &json).is_empty());
    let wrong = page.replace("0.1235", "0.1236");
    assert_eq!(disagreements(&wrong, &json).len(), 1);
    assert_eq!(spans(page).len(), 4);
}
