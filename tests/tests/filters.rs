//! CHECKS.md "Filters": the first-order Butterworth sections against SciPy.

use ridgeline::seek::filter::FirstOrder;
use ridgeline_tests::python_json;

const CASES: [(f64, f64); 4] = [(0.05, 1.0), (2.0, 20.0), (0.004, 1.0), (0.3, 1000.0)];

/// SciPy's `butter(1, fc, kind, fs=fs)` and its `freqz` at a test frequency and at the cutoff.
fn scipy_reference() -> serde_json::Value {
    let cases: Vec<String> = CASES.iter().map(|(fc, fs)| format!("({fc:?}, {fs:?})")).collect();
    python_json(&format!(
        r#"
import json
from scipy.signal import butter, freqz
out = []
for fc, fs in [{cases}]:
    f = min(3 * fc, 0.45 * fs)
    row = {{"f": f}}
    for kind in ("highpass", "lowpass"):
        b, a = butter(1, fc, kind, fs=fs)
        _, h = freqz(b, a, worN=[f, fc], fs=fs)
        row[kind] = dict(b=[float(v) for v in b], a=[float(v) for v in a],
                         re=float(h[0].real), im=float(h[0].imag), at_cutoff=float(abs(h[1])))
    out.append(row)
print(json.dumps(out))
"#,
        cases = cases.join(", ")
    ))
}

fn section(kind: &str, fc: f64, fs: f64) -> FirstOrder {
    match kind {
        "highpass" => FirstOrder::highpass(fc, fs),
        _ => FirstOrder::lowpass(fc, fs),
    }
}

fn num(v: &serde_json::Value) -> f64 {
    v.as_f64().expect("a number from the reference")
}

#[test]
fn coefficients_equal_scipy_butter_to_1e_12() {
    let reference = scipy_reference();
    for (row, &(fc, fs)) in reference.as_array().unwrap().iter().zip(&CASES) {
        for kind in ["highpass", "lowpass"] {
            let (b, a) = section(kind, fc, fs).coefficients();
            let want = &row[kind];
            for i in 0..2 {
                // Source: reference library SciPy (scipy.signal.butter), pinned in tests/requirements.txt.
                assert!(
                    (b[i] - num(&want["b"][i])).abs() < 1e-12,
                    "{kind} fc={fc} fs={fs} b[{i}]: {} vs {}",
                    b[i],
                    want["b"][i]
                );
                assert!(
                    (a[i] - num(&want["a"][i])).abs() < 1e-12,
                    "{kind} fc={fc} fs={fs} a[{i}]: {} vs {}",
                    a[i],
                    want["a"][i]
                );
            }
        }
    }
}

#[test]
fn frequency_response_equals_scipy_freqz_to_1e_9() {
    let reference = scipy_reference();
    for (row, &(fc, fs)) in reference.as_array().unwrap().iter().zip(&CASES) {
        let f = num(&row["f"]);
        for kind in ["highpass", "lowpass"] {
            let (re, im) = section(kind, fc, fs).response(f, fs);
            let want = &row[kind];
            // Source: reference library SciPy (scipy.signal.freqz): magnitude and phase via re/im.
            assert!(
                (re - num(&want["re"])).abs() < 1e-9,
                "{kind} fc={fc} fs={fs}: re {re} vs {}",
                want["re"]
            );
            assert!(
                (im - num(&want["im"])).abs() < 1e-9,
                "{kind} fc={fc} fs={fs}: im {im} vs {}",
                want["im"]
            );
            let (cre, cim) = section(kind, fc, fs).response(fc, fs);
            let at_cutoff = cre.hypot(cim);
            // Source: Butterworth definition, |H| = 1/sqrt(2) at the cutoff (-3 dB), which prewarping keeps exact.
            assert!(
                (at_cutoff - std::f64::consts::FRAC_1_SQRT_2).abs() < 1e-12,
                "{kind} fc={fc}: {at_cutoff}"
            );
            // Source: reference library SciPy (scipy.signal.freqz) at the cutoff.
            assert!((at_cutoff - num(&want["at_cutoff"])).abs() < 1e-9);
        }
    }
}

#[test]
fn worked_highpass_values_hold() {
    let (b, a) = FirstOrder::highpass(0.05, 1.0).coefficients();
    // Source: CHECKS.md "Filters" worked values (computed there with scipy.signal.butter).
    assert!((b[0] - 0.863271264003).abs() < 1e-12);
    assert!((b[1] + 0.863271264003).abs() < 1e-12);
    assert!((a[1] + 0.726542528005).abs() < 1e-12);
}

#[test]
fn filtered_response_to_a_sine_matches_the_computed_response() {
    // The response() used by predictions must describe what filter() actually does.
    let (fc, fs, f) = (0.01, 1.0, 0.05);
    let mut hp = FirstOrder::highpass(fc, fs);
    let (re, im) = hp.response(f, fs);
    let n = 4000;
    let (mut c, mut s) = (0.0, 0.0);
    for k in 0..n {
        let w = std::f64::consts::TAU * f * k as f64 / fs;
        let y = hp.filter(w.sin());
        if k >= n / 2 {
            c += y * w.cos();
            s += y * w.sin();
        }
    }
    // y = |H| sin(w + phi) = re sin(w) + im cos(w): lock-in over whole periods.
    let half = (n / 2) as f64 / 2.0;
    assert!(
        (s / half - re).abs() < 1e-6 && (c / half - im).abs() < 1e-6,
        "{} {} vs {re} {im}",
        s / half,
        c / half
    );
}

#[test]
fn constant_input_gives_exactly_zero_from_the_first_sample() {
    // Source: DESIGN.md §4 (high-pass starts with its previous input equal to the first sample).
    let mut hp = FirstOrder::highpass(0.004, 1.0);
    assert!((0..10_000).all(|_| hp.filter(123.456) == 0.0));
}
