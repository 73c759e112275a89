//! `GET /api/v1/loops/{loop}/trend`: history reduced to buckets by the database, checked
//! against NumPy's reduction of the same stored samples.

use std::time::Duration;

use ridgeline_tests::{http_request, python_json, wait_until};

use crate::rig::Rig;

fn get(rig: &Rig, path: &str) -> ridgeline_tests::HttpAnswer {
    http_request(rig.api(), "GET", path, &[], None).expect("the API answers")
}

#[test]
fn a_trend_holds_the_min_mean_and_max_of_each_bucket_of_the_stored_samples() {
    let rig = Rig::seeking("", "y");
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("20 s of samples stored", Duration::from_secs(60), || {
        let answer = get(&rig, "/api/v1/loops/bowl/trend?window=2m&points=24");
        answer.status == 200 && answer.json()["buckets"].as_array().is_some_and(|b| b.len() >= 5)
    });
    let asked_ms = ridgeline::history::now_ms();
    let trend = get(&rig, "/api/v1/loops/bowl/trend?window=2m&points=24").json();
    assert_eq!(trend["resolution"], "raw");
    assert_eq!(trend["bucket_s"], 5.0, "2 minutes in 24 buckets");
    let since = ridgeline::history::parse_rfc3339(trend["since"].as_str().unwrap()).unwrap();
    let until = trend["until"].as_str().unwrap();
    assert_eq!(ridgeline::history::parse_rfc3339(until).unwrap() - since, 120_000);
    assert_eq!(since % 5000, 0, "buckets aligned to multiples of their width");

    // Only buckets that had ended well before the trend was asked for: later samples
    // may still have been on their way to the database.
    let settled: Vec<&serde_json::Value> = trend["buckets"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|b| {
            ridgeline::history::parse_rfc3339(b["at"].as_str().unwrap()).unwrap() + 5000 < asked_ms - 3000
        })
        .collect();
    assert!(settled.len() >= 2, "{trend}");
    let samples = get(&rig, &format!("/api/v1/loops/bowl/samples?until={until}&limit=10000")).json();
    let at_ms: Vec<i64> = samples
        .as_array()
        .unwrap()
        .iter()
        .map(|s| ridgeline::history::parse_rfc3339(s["at"].as_str().unwrap()).unwrap())
        .collect();
    let rows: Vec<serde_json::Value> = samples
        .as_array()
        .unwrap()
        .iter()
        .zip(&at_ms)
        .map(|(s, at)| {
            serde_json::json!([at, s["objective"], s["inputs"]["u"]["applied"], s["inputs"]["u"]["estimate"]])
        })
        .collect();
    // Source: NumPy's min, mean and max over the samples of each bucket.
    let reference = python_json(&format!(
        "import json, numpy as np\n\
         rows = json.loads('''{}''')\n\
         since, width = {since}, 5000\n\
         out = {{}}\n\
         for k in sorted({{(r[0] - since) // width for r in rows if r[0] >= since}}):\n\
         \x20   b = [r for r in rows if r[0] >= since and (r[0] - since) // width == k]\n\
         \x20   y = np.array([r[1] for r in b if r[1] is not None], dtype=float)\n\
         \x20   out[str(since + k * width)] = [len(b), y.min(), y.mean(), y.max(),\n\
         \x20       np.mean([r[2] for r in b]), np.mean([r[3] for r in b])]\n\
         print(json.dumps(out))\n",
        serde_json::Value::Array(rows)
    ));
    for bucket in settled {
        let start = ridgeline::history::parse_rfc3339(bucket["at"].as_str().unwrap()).unwrap();
        let want = &reference[start.to_string()];
        let close = |got: &serde_json::Value, want: &serde_json::Value| {
            (got.as_f64().unwrap() - want.as_f64().unwrap()).abs()
                <= 1e-9 * want.as_f64().unwrap().abs().max(1.0)
        };
        assert_eq!(bucket["samples"], want[0], "bucket at {start}");
        for (got, k) in [
            (&bucket["objective"]["min"], 1),
            (&bucket["objective"]["mean"], 2),
            (&bucket["objective"]["max"], 3),
            (&bucket["inputs"]["u"]["applied"], 4),
            (&bucket["inputs"]["u"]["estimate"], 5),
        ] {
            assert!(close(got, &want[k]), "bucket at {start}, value {k}: {got} against NumPy's {}", want[k]);
        }
    }
}

#[test]
fn a_trend_window_or_points_out_of_range_is_refused_naming_the_parameter() {
    let rig = Rig::new("");
    let _service = rig.service();
    wait_until("the API answers", Duration::from_secs(20), || {
        http_request(rig.api(), "GET", "/healthz", &[], None).is_some()
    });
    for (query, names) in [
        ("window=731d", "window"),
        ("window=10", "window"),
        ("window=yesterday", "window"),
        ("points=0", "points"),
        ("points=2001", "points"),
        ("points=many", "points"),
    ] {
        let answer = get(&rig, &format!("/api/v1/loops/bowl/trend?{query}"));
        assert_eq!(answer.status, 400, "{query}: {}", answer.body);
        let message = answer.json()["error"]["message"].as_str().unwrap_or_default().to_owned();
        assert!(message.contains(names), "{query}: {message}");
    }
    assert_eq!(get(&rig, "/api/v1/loops/nope/trend").status, 404);
    let empty = get(&rig, "/api/v1/loops/bowl/trend?window=1h").json();
    assert!(empty["buckets"].is_array(), "{empty}");
}
