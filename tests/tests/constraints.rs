//! CHECKS.md "Constraints" (DeHaan & Guay 2005, Automatica 41(9):1567-1574, barrier and
//! penalty extremum seeking; Nocedal & Wright 2006, *Numerical Optimization*, ch. 17,
//! quadratic penalty; from memory): loops with constraints, rehearsed against plants with
//! lag, dead time and noise, and compared with SciPy's optimisers run at test time on the
//! same static maps. Penalty handling settles where the penalised objective is best and
//! its residual violation shrinks like `1/weight`; back-off handling keeps the loop about a
//! margin inside a limit that the unconstrained optimum lies past, without chattering.

use ridgeline_tests::{python_json, write_file};

use crate::rehearse_command::{read_csv, rehearse};

/// Every loop here dithers with this period; a constraint is released no sooner than one
/// period after its value came back inside.
const DITHER_PERIOD_S: f64 = 30.0;
/// Plant time rehearsed, at 1 s ticks.
const DURATION_S: f64 = 4.0 * 3600.0;
const DURATION: &str = "4h";

/// One output of a plant model: its name (also the loop's tag), its static map over the
/// plant's input, and its measurement noise. Every output lags 3 s behind the input
/// after a 1 s dead time.
struct Output {
    name: &'static str,
    expression: &'static str,
    noise_std: f64,
}

/// A plant model with one input, starting at `initial`, and two outputs read at input
/// registers 100 and 102.
fn plant(input: &str, initial: f64, seed: u64, outputs: [&Output; 2]) -> String {
    let mut text = format!(
        "step_s = 0.5\nseed = {seed}\n\n[[inputs]]\nname = \"{input}\"\ninitial = {initial:?}\nholding_register = 200\n"
    );
    for (k, o) in outputs.iter().enumerate() {
        text.push_str(&format!(
            "\n[[outputs]]\nname = \"{}\"\ninput_register = {}\nexpression = \"{}\"\nlag_s = 3\ndead_time_s = 1\nnoise_std = {:?}\n",
            o.name,
            100 + 2 * k,
            o.expression,
            o.noise_std
        ));
    }
    text
}

/// The link and the tags of a config whose loops read the plant's two outputs.
fn tags(outputs: [&Output; 2]) -> String {
    let mut text = String::from("[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n");
    for (k, o) in outputs.iter().enumerate() {
        text.push_str(&format!(
            "\n[tags.{}]\nlink = \"plc\"\ninput_register = {}\ntype = \"f32\"\n",
            o.name,
            100 + 2 * k
        ));
    }
    text
}

/// The one input of a sine loop.
struct Input {
    name: &'static str,
    bounds: [f64; 2],
    max_rate_per_s: f64,
    dither_amplitude: f64,
    gain: f64,
}

impl Input {
    fn span(&self) -> f64 {
        self.bounds[1] - self.bounds[0]
    }
}

/// A sine loop named `name` that drives `input` to maximize or minimize `objective`, with
/// one `[[loops.constraints]]` table.
fn sine_loop(name: &str, direction: &str, objective: &str, input: &Input, constraint: &str) -> String {
    let [lo, hi] = input.bounds;
    format!(
        "\n[[loops]]\nname = \"{name}\"\nobjective = \"{objective}\"\ndirection = \"{direction}\"\ntick_s = 1.0\n\
         [loops.filter]\nhighpass_hz = 0.01\nphase_deg = 45\n[loops.watchdog]\nstale_after_s = 5\n\
         [[loops.inputs]]\nname = \"{input_name}\"\nwrite = {{ link = \"plc\", holding_register = 200, type = \"f32\" }}\n\
         limits = [{limit_lo:?}, {limit_hi:?}]\nbounds = [{lo:?}, {hi:?}]\nsafe = {safe:?}\n\
         max_rate_per_s = {rate:?}\ndither_amplitude = {amplitude:?}\ndither_period_s = {DITHER_PERIOD_S:?}\ngain = {gain:?}\n\
         [[loops.constraints]]\n{constraint}",
        input_name = input.name,
        limit_lo = lo - 0.5,
        limit_hi = hi + 1.0,
        safe = 0.5 * (lo + hi),
        rate = input.max_rate_per_s,
        amplitude = input.dither_amplitude,
        gain = input.gain,
    )
}

/// Python that defines `objective(x)` and `value(x)`, the static maps of the plant's
/// outputs as functions of its input, from the very expressions the plant model uses.
fn python_maps(input: &str, objective: &Output, value: &Output) -> String {
    format!(
        "import json, math\n\
         names = {{'exp': math.exp, 'ln': math.log, 'sqrt': math.sqrt, 'abs': abs, 'min': min, 'max': max}}\n\
         def static_map(expression):\n    \
             f = eval('lambda {input}: ' + expression.replace('^', '**'), names)\n    \
             return lambda x: float(f(x))\n\
         objective = static_map({:?})\n\
         value = static_map({:?})\n",
        objective.expression, value.expression
    )
}

/// What SciPy finds for a penalty constraint at one weight.
#[derive(Debug, Clone, Copy)]
struct Penalised {
    /// The minimiser over the bounds of the objective the core sees, turned into a cost.
    minimiser: f64,
    /// How far past the limit the constraint's value stands there.
    excess: f64,
}

/// `scipy.optimize.minimize_scalar` (method "bounded") over the input's bounds of the
/// loop's objective penalised by `weight * excess^2` past the limit, as CHECKS.md asks,
/// for each weight: the cost `-J + penalty` for a maximizing loop, `J + penalty` for a
/// minimizing one. `side` is "max" or "min".
fn scipy_penalised(
    maps: &str,
    direction: &str,
    side: &str,
    limit: f64,
    bounds: [f64; 2],
    weights: &[f64],
) -> Vec<Penalised> {
    let script = format!(
        "{maps}from scipy.optimize import minimize_scalar\n\
         sign = 1.0 if {direction:?} == 'maximize' else -1.0\n\
         def excess(x):\n    \
             return max(value(x) - {limit:?}, 0.0) if {side:?} == 'max' else max({limit:?} - value(x), 0.0)\n\
         out = []\n\
         for w in {weights:?}:\n    \
             r = minimize_scalar(lambda x: -sign * objective(x) + w * excess(x) ** 2, bounds=({lo:?}, {hi:?}),\n                        \
                                 method='bounded', options={{'xatol': 1e-10}})\n    \
             assert r.success, r.message\n    \
             out.append({{'minimiser': float(r.x), 'excess': excess(r.x)}})\n\
         print(json.dumps(out))\n",
        lo = bounds[0],
        hi = bounds[1],
    );
    python_json(&script)
        .as_array()
        .expect("a list from SciPy")
        .iter()
        .map(|r| Penalised {
            minimiser: r["minimiser"].as_f64().expect("a number"),
            excess: r["excess"].as_f64().expect("a number"),
        })
        .collect()
}

/// A rehearsed loop's CSV: its header and rows.
fn rehearsed_csv(dir: &std::path::Path, loop_name: &str) -> (Vec<String>, Vec<Vec<f64>>) {
    read_csv(&dir.join(format!("{loop_name}.csv")))
}

/// The mean of a CSV column over the last quarter of the run (the quarter the report
/// scores).
fn last_quarter_mean(csv: &(Vec<String>, Vec<Vec<f64>>), column: &str) -> f64 {
    let (header, rows) = csv;
    let k =
        header.iter().position(|h| h == column).unwrap_or_else(|| panic!("no column {column} in {header:?}"));
    let quarter = &rows[rows.len() * 3 / 4..];
    quarter.iter().map(|r| r[k]).sum::<f64>() / quarter.len() as f64
}

/// Runs `rehearse --json --csv` and returns the report.
fn rehearse_json(dir: &std::path::Path, config: &str, plant: &str, extra: &[&str]) -> serde_json::Value {
    let cfg = write_file(dir, "loops.toml", config);
    let plant = write_file(dir, "plant.toml", plant);
    let csv = dir.join("csv");
    let mut args = vec!["--duration", DURATION, "--json", "--csv", csv.to_str().expect("utf-8 path")];
    args.extend_from_slice(extra);
    let run = rehearse(cfg.to_str().expect("utf-8 path"), plant.to_str().expect("utf-8 path"), &args);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("not JSON ({e}):\n{}", run.stdout))
}

/// Fuel burnt, to minimize: best at u = 2, where the temperature is too low.
const FUEL: Output = Output { name: "fuel", expression: "3 + 0.5 * (u - 2)^2", noise_std: 0.01 };
/// A temperature that must stay at 110 or above: it rises with u, concavely, and meets
/// 110 at u = e^1.4 = 4.06.
const TEMPERATURE: Output = Output { name: "temp", expression: "40 + 50 * ln(u)", noise_std: 0.1 };

#[test]
fn a_penalty_on_a_minimum_settles_a_minimizing_loop_where_scipy_minimizes_the_penalised_objective() {
    let input =
        Input { name: "u", bounds: [1.0, 9.0], max_rate_per_s: 0.03, dither_amplitude: 0.05, gain: 0.001 };
    let weight = 0.01;
    let constraint = format!(
        "name = \"temp_low\"\nvalue = \"temp\"\nmin = 110\nhandling = \"penalty\"\nweight = {weight:?}\n"
    );
    let config = tags([&FUEL, &TEMPERATURE]) + &sine_loop("burner", "minimize", "fuel", &input, &constraint);
    // The plant starts at the unconstrained optimum, 35 degrees too cold.
    let plant = plant("u", 2.0, 11, [&FUEL, &TEMPERATURE]);
    let dir = tempfile::tempdir().unwrap();
    let report = rehearse_json(dir.path(), &config, &plant, &[]);
    let l = &report["loops"][0];
    let c = &l["constraints"][0];
    assert_eq!(
        (c["name"].as_str(), c["handling"].as_str(), c["side"].as_str()),
        (Some("temp_low"), Some("penalty"), Some("min")),
        "{c}"
    );

    let maps = python_maps("u", &FUEL, &TEMPERATURE);
    let scipy = scipy_penalised(&maps, "minimize", "min", 110.0, input.bounds, &[weight])[0];
    let csv = rehearsed_csv(&dir.path().join("csv"), "burner");
    let estimate = last_quarter_mean(&csv, "u.estimate");
    let excess = 110.0 - last_quarter_mean(&csv, "temp_low.value");
    eprintln!(
        "penalty on a minimum: SciPy minimiser {:.5} (excess {:.4}), rehearsed last-quarter estimate {estimate:.5} (excess {excess:.4})",
        scipy.minimiser, scipy.excess
    );
    // Source: scipy.optimize.minimize_scalar (SciPy), method "bounded", on the same static
    // map penalised with the same weight; CHECKS.md asks for 2% of the bounds span.
    assert!(
        (estimate - scipy.minimiser).abs() < 0.02 * input.span(),
        "rehearsed {estimate} vs SciPy's {}",
        scipy.minimiser
    );
    // The penalty leaves the temperature short of its minimum, as it should: a penalty
    // trades the violation against the objective.
    assert!(scipy.excess > 1.0, "{scipy:?}");
    // Source: the same SciPy minimiser's shortfall, within 5%.
    assert!(
        (excess / scipy.excess - 1.0).abs() < 0.05,
        "rehearsed shortfall {excess} vs SciPy's {}",
        scipy.excess
    );
}

/// Efficiency, to maximize: best at u = 6, where the load is 60.
const EFFICIENCY: Output = Output { name: "eff", expression: "10 - (u - 6)^2", noise_std: 0.01 };
/// A load that must stay at 20 or below, reached at u = 2.
const LOAD: Output = Output { name: "load", expression: "10 * u", noise_std: 0.1 };

#[test]
fn a_penalty_on_a_maximum_leaves_a_violation_that_shrinks_like_one_over_the_weight_as_scipy_finds() {
    // The stiffer penalised map (curvature 2 + 2 * 4w * 10^2 = 82) sets the gain: its time
    // constant, 1 / (gain * 82) = 150 s, is five dither periods. The dither (0.03, a load
    // of 0.3) stays past the limit at both weights, so the dither sees the penalty as the
    // smooth quadratic SciPy sees.
    let input =
        Input { name: "u", bounds: [1.0, 9.0], max_rate_per_s: 0.03, dither_amplitude: 0.03, gain: 8e-5 };
    let weights = [0.1, 0.4];
    let names = ["light", "heavy"];
    let mut config = tags([&EFFICIENCY, &LOAD]);
    for (name, weight) in names.iter().zip(weights) {
        let constraint = format!(
            "name = \"load_high\"\nvalue = \"load\"\nmax = 20\nhandling = \"penalty\"\nweight = {weight:?}\n"
        );
        config.push_str(&sine_loop(name, "maximize", "eff", &input, &constraint));
    }
    // Both loops start 10 past the limit, each on its own copy of the plant.
    let plant = plant("u", 3.0, 7, [&EFFICIENCY, &LOAD]);
    let dir = tempfile::tempdir().unwrap();
    let report = rehearse_json(dir.path(), &config, &plant, &["--separately"]);

    let maps = python_maps("u", &EFFICIENCY, &LOAD);
    let scipy = scipy_penalised(&maps, "maximize", "max", 20.0, input.bounds, &weights);
    let mut rehearsed_excess = Vec::new();
    for (k, (name, weight)) in names.iter().zip(weights).enumerate() {
        let c = &report["loops"][k]["constraints"][0];
        assert_eq!((c["handling"].as_str(), c["side"].as_str()), (Some("penalty"), Some("max")), "{c}");
        let csv = rehearsed_csv(&dir.path().join("csv"), name);
        let estimate = last_quarter_mean(&csv, "u.estimate");
        let excess = last_quarter_mean(&csv, "load_high.value") - 20.0;
        eprintln!(
            "weight {weight}: SciPy minimiser {:.5} excess {:.4}; rehearsed estimate {estimate:.5} excess {excess:.4}",
            scipy[k].minimiser, scipy[k].excess
        );
        // Source: scipy.optimize.minimize_scalar (SciPy), method "bounded", on the same
        // static map penalised with the same weight; CHECKS.md asks for 2% of the span.
        assert!(
            (estimate - scipy[k].minimiser).abs() < 0.02 * input.span(),
            "weight {weight}: rehearsed {estimate} vs SciPy's {}",
            scipy[k].minimiser
        );
        // Source: the same SciPy minimiser's excess, within 5%.
        assert!(
            (excess / scipy[k].excess - 1.0).abs() < 0.05,
            "weight {weight}: rehearsed excess {excess} vs SciPy's {}",
            scipy[k].excess
        );
        rehearsed_excess.push(excess);
    }
    // Source: Nocedal & Wright 2006, ch. 17 (from memory): the quadratic penalty's
    // minimiser violates the constraint by about lambda* / (2 weight), so four times the
    // weight leaves about a quarter of the violation; within 15% of 4. (On this map the
    // exact ratio is (1 + 4W) / (1 + W) with W = 100 weight, 3.73: our own algebra.)
    let scipy_ratio = scipy[0].excess / scipy[1].excess;
    let rehearsed_ratio = rehearsed_excess[0] / rehearsed_excess[1];
    eprintln!("excess ratio e(w)/e(4w): SciPy {scipy_ratio:.4}, rehearsed {rehearsed_ratio:.4}");
    for (who, ratio) in [("SciPy", scipy_ratio), ("rehearsed", rehearsed_ratio)] {
        assert!((ratio / 4.0 - 1.0).abs() < 0.15, "{who}: e(w)/e(4w) = {ratio}");
    }
}

/// Boiler efficiency, to maximize: best at 1.2% O2, where CO is far too high.
const BOILER_EFFICIENCY: Output =
    Output { name: "eff", expression: "88 - 0.6 * (o2 - 1.2)^2", noise_std: 0.005 };
/// CO in ppm, falling as O2 rises; 150 at 410/260 = 1.577% O2.
const CO: Output = Output { name: "co", expression: "560 - 260 * o2", noise_std: 1.0 };

#[test]
fn a_back_off_keeps_the_loop_a_margin_inside_a_limit_its_unconstrained_optimum_lies_past() {
    // A dither of 0.015% O2 swings CO by 3.9 ppm, well inside the 30 ppm margin; at the
    // rate limit the 3 s lag and 1 s dead time overshoot by about 4 ppm.
    let input =
        Input { name: "o2", bounds: [0.5, 4.0], max_rate_per_s: 0.004, dither_amplitude: 0.015, gain: 0.003 };
    let (limit, margin) = (150.0, 30.0);
    let constraint = format!(
        "name = \"co_high\"\nvalue = \"co\"\nmax = {limit:?}\nhandling = \"back_off\"\nmove = {{ o2 = \"up\" }}\nmargin = {margin:?}\n"
    );
    let config =
        tags([&BOILER_EFFICIENCY, &CO]) + &sine_loop("boiler", "maximize", "eff", &input, &constraint);
    let plant = plant("o2", 3.0, 5, [&BOILER_EFFICIENCY, &CO]);
    let dir = tempfile::tempdir().unwrap();
    let report = rehearse_json(dir.path(), &config, &plant, &[]);
    let l = &report["loops"][0];

    // Source: scipy.optimize.brentq (SciPy) for where CO meets its limit, and
    // scipy.optimize.minimize_scalar (SciPy), method "bounded", for the best efficiency
    // on the whole bounds and on the side of that point where CO is within its limit.
    let scipy = python_json(&format!(
        "{maps}from scipy.optimize import brentq, minimize_scalar\n\
         lo, hi = {lo:?}, {hi:?}\n\
         edge = brentq(lambda x: value(x) - {limit:?}, lo, hi, xtol=1e-12)\n\
         feasible = (edge, hi) if value(hi) <= {limit:?} else (lo, edge)\n\
         best = lambda bounds: float(minimize_scalar(lambda x: -objective(x), bounds=bounds, method='bounded',\n                                                     options={{'xatol': 1e-10}}).x)\n\
         h = 1e-6\n\
         slope = (value(edge + h) - value(edge - h)) / (2 * h)\n\
         free = best((lo, hi))\n\
         print(json.dumps({{'edge': edge, 'constrained': best(feasible), 'unconstrained': free,\n\
                           'past': value(free) - {limit:?}, 'slope': slope}}))\n",
        maps = python_maps("o2", &BOILER_EFFICIENCY, &CO),
        lo = input.bounds[0],
        hi = input.bounds[1],
    ));
    let number = |key: &str| scipy[key].as_f64().unwrap_or_else(|| panic!("no {key} from SciPy: {scipy}"));
    let (constrained, unconstrained) = (number("constrained"), number("unconstrained"));
    assert!(number("past") > margin, "the unconstrained optimum lies well past the limit: {scipy}");
    // A margin-sized distance: the margin in CO over CO's slope at the limit.
    let margin_distance = margin / number("slope").abs();

    let csv = rehearsed_csv(&dir.path().join("csv"), "boiler");
    let estimate = last_quarter_mean(&csv, "o2.estimate");
    let c = &l["constraints"][0];
    let fraction = c["fraction_past_limit"].as_f64().expect("a fraction");
    let engagements = c["engagements"].as_u64().expect("a count");
    eprintln!(
        "back-off: SciPy constrained optimum {constrained:.5}, unconstrained {unconstrained:.5}, margin-sized distance {margin_distance:.5}; \
         rehearsed last-quarter estimate {estimate:.5} ({:.2} margins inside), past the limit {:.2}% of ticks, {engagements} engagements; \
         report: {}",
        (estimate - constrained).abs() / margin_distance,
        100.0 * fraction,
        l["final"]
    );
    assert_eq!((c["handling"].as_str(), c["side"].as_str()), (Some("back_off"), Some("max")), "{c}");
    // Source: CHECKS.md, the mean estimate over the last quarter sits within a margin-sized
    // distance of the constrained optimum that SciPy finds.
    assert!(
        (estimate - constrained).abs() < margin_distance,
        "rehearsed {estimate} vs SciPy's constrained optimum {constrained}, margin-sized distance {margin_distance}"
    );
    // Source: CHECKS.md, the fraction of ticks beyond the limit stays under 10%.
    assert!(fraction < 0.10, "{c}");

    // The report's own optima agree with SciPy's.
    let last = &l["final"]["o2"];
    let reported = |key: &str| last[key].as_f64().unwrap_or_else(|| panic!("no {key} in {last}"));
    // Source: SciPy's constrained optimum above, to 1e-3 of the bounds span.
    assert!((reported("optimum") - constrained).abs() < 1e-3 * input.span(), "{last} vs SciPy {scipy}");
    // Source: SciPy's unconstrained optimum above, to 1e-3 of the bounds span.
    assert!(
        (reported("unconstrained_optimum") - unconstrained).abs() < 1e-3 * input.span(),
        "{last} vs SciPy {scipy}"
    );

    // No fast chatter: each engagement lasts at least one dither period, so there are no
    // more of them than dither periods in the run...
    assert!(engagements >= 1, "the loop never met its limit: {c}");
    assert!(
        engagements as f64 <= DURATION_S / DITHER_PERIOD_S,
        "{engagements} engagements in {DURATION_S} s"
    );
    // ...and every engagement the report lists was released no sooner than a period later.
    let changes: Vec<(f64, &str)> = l["events"]
        .as_array()
        .expect("events")
        .iter()
        .filter(|e| e["kind"].as_str().is_some_and(|k| k.starts_with("constraint_")))
        .map(|e| (e["t_s"].as_f64().expect("a time"), e["kind"].as_str().unwrap_or("")))
        .collect();
    assert!(changes.len() >= 2, "{:?}", l["events"]);
    for pair in changes.chunks_exact(2) {
        assert_eq!((pair[0].1, pair[1].1), ("constraint_engaged", "constraint_released"), "{changes:?}");
        assert!(
            pair[1].0 - pair[0].0 >= DITHER_PERIOD_S,
            "engaged for {} s only: {changes:?}",
            pair[1].0 - pair[0].0
        );
    }
}
