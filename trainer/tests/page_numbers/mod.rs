//! The report page's numbers read back from its text, without the page's
//! own formatter: each `<span data-k="KEY" data-x="F">TEXT</span>` is parsed
//! to a number (thousands separators dropped), divided by the factor F the
//! page applied (100 for percent, 1e-6 for mega, 1 when absent), and must
//! equal report.json's value at KEY to within half a unit of the last digit
//! the page shows (so the page rounds the file's number correctly, whatever
//! formatting and unit prefix it chose).

use serde_json::Value;

/// (key, page text) for every tagged number, read from the HTML here.
pub fn spans(html: &str) -> Vec<(String, String)> {
    tagged(html).into_iter().map(|(k, t, _)| (k, t)).collect()
}

/// (key, page text, factor) for every tagged number.
pub fn tagged(html: &str) -> Vec<(String, String, f64)> {
    let open = "<span data-k=\"";
    html.split(open)
        .skip(1)
        .filter_map(|rest| {
            let (key, after) = rest.split_once('"')?;
            let (attrs, body) = after.split_once('>')?;
            let factor = attrs
                .split_once("data-x=\"")
                .and_then(|(_, x)| x.split_once('"'))
                .and_then(|(x, _)| x.parse::<f64>().ok())
                .unwrap_or(1.0);
            let (text, _) = body.split_once("</span>")?;
            let text = text
                .replace("&lt;", "<")
                .replace("&gt;", ">")
                .replace("&amp;", "&");
            Some((key.to_string(), text, factor))
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

/// Whether the page text, shown with `factor` applied, shows `value`.
pub fn shows(text: &str, factor: f64, value: &Value) -> bool {
    match value {
        Value::Number(n) => {
            let digits = text.trim().replace(',', "");
            let Ok(shown) = digits.parse::<f64>() else {
                return false;
            };
            let v = n.as_f64().unwrap() * factor;
            let half = if digits.contains(['.', 'e']) {
                half_unit(&digits)
            } else {
                0.5
            };
            (shown - v).abs() <= half * (1.0 + 1e-9) + 1e-12 * v.abs()
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
    tagged(html)
        .into_iter()
        .filter_map(|(key, text, factor)| {
            let value = report.pointer(&format!("/{key}")).unwrap_or(&Value::Null);
            (!shows(&text, factor, value)).then(|| (key, text, value.to_string()))
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
    // Percent and prefixes: 0.123456 as 12.35 % (factor 100), 12345 as
    // 12.35 k (factor 1e-3), counts with separators.
    let scaled = "<span data-k=\"a\" data-x=\"1e2\">12.35</span>\
                  <span data-k=\"b\" data-x=\"1e-3\">12.35</span>\
                  <span data-k=\"b\" data-x=\"1e0\">12,345</span>";
    assert!(disagreements(scaled, &json).is_empty());
    let wrong = scaled.replace("12.35<", "12.36<");
    assert_eq!(disagreements(&wrong, &json).len(), 2);
}

/// The number of cells of the first table after `heading`, asserting that
/// every digit a cell shows is inside a tagged number (as
/// `cargo xtask browser` demands of every table cell).
pub fn cells_without_untagged_digits(html: &str, heading: &str) -> usize {
    let (_, after) = html.split_once(heading).expect("heading on the page");
    let table = &after[..after.find("</table>").expect("a table after the heading")];
    let mut cells = 0;
    for cell in table.split("<td>").skip(1) {
        let mut text = cell.split("</td>").next().unwrap_or("").to_string();
        // Drop tagged numbers, then every remaining tag.
        while let Some(a) = text.find("<span data-k=") {
            let b = a + text[a..].find("</span>").expect("closed span") + "</span>".len();
            text.replace_range(a..b, "");
        }
        while let Some(a) = text.find('<') {
            let b = a + text[a..].find('>').expect("closed tag") + 1;
            text.replace_range(a..b, "");
        }
        assert!(
            !text.chars().any(|c| c.is_ascii_digit()),
            "untagged digit in {cell}"
        );
        cells += 1;
    }
    cells
}
