//! The semantic rules of a config that reads well as TOML: cross-references, ranges,
//! and whether each loop's dither can work at all. Every rule reports by key path.

use std::collections::{HashMap, HashSet};

use super::read::Problems;
use super::show;
use super::{
    Codec, Config, Filter, Handling, InputConfig, LinkKind, LoopConfig, MethodConfig, NewtonConfig, Recover,
    RegisterType, StepwiseConfig, TagSource,
};

pub(super) fn validate(config: &Config, p: &Problems) {
    validate_with(config, p, true);
}

/// As [`validate`], for loops that each get a plant of their own (`rehearse
/// --separately`): loops may write the same registers, inputs of one loop still may not.
pub(super) fn validate_loops_apart(config: &Config, p: &Problems) {
    validate_with(config, p, false);
}

fn validate_with(config: &Config, p: &Problems, loops_share_a_plant: bool) {
    let service = &config.service;
    if service.retention_days == 0 {
        p.at("service.retention_days", "must be at least 1 day");
    }
    if service.rollup_retention_days < service.retention_days {
        p.at(
            "service.rollup_retention_days",
            format!(
                "{} days is shorter than retention_days ({}): rollups are what is left of samples past their retention",
                service.rollup_retention_days, service.retention_days
            ),
        );
    }
    let mut access_names = HashSet::new();
    for (i, a) in config.access.iter().enumerate() {
        if a.name.trim().is_empty() {
            p.at(&format!("access[{i}].name"), "must not be empty: it names who made each change");
        } else if !access_names.insert(a.name.as_str()) {
            p.at(&format!("access[{i}].name"), format!("`{}` is used by another [[access]] entry", a.name));
        }
    }
    for link in &config.links {
        validate_link(link, p);
    }
    for tag in &config.tags {
        validate_tag(config, tag, p);
    }
    let mut loop_names = HashSet::new();
    for (i, l) in config.loops.iter().enumerate() {
        let path = format!("loops[{i}]");
        if !loop_names.insert(l.name.as_str()) {
            p.at(&format!("{path}.name"), format!("`{}` is the name of another loop", l.name));
        }
        validate_loop(config, l, &path, p);
    }
    check_write_collisions(config, p, loops_share_a_plant);
}

/// Shortest tick: each tick is a network round trip to the PLC.
const MIN_TICK_S: f64 = 0.01;

/// `[a-z][a-z0-9_]*`: names that expressions and CSV headers can use as they are.
pub(crate) fn is_identifier(name: &str) -> bool {
    let mut chars = name.chars();
    chars.next().is_some_and(|c| c.is_ascii_lowercase())
        && chars.all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
}

fn is_loop_name(name: &str) -> bool {
    !name.is_empty() && name.chars().all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-')
}

fn validate_link(link: &super::Link, p: &Problems) {
    let path = format!("links.{}", link.name);
    if !is_loop_name(&link.name.replace('_', "-")) {
        p.at(&path, format!("link name `{}` may only use a-z, 0-9, `-` and `_`", link.name));
    }
    if link.timeout_ms == 0 {
        p.at(&format!("{path}.timeout_ms"), "must be at least 1 ms");
    }
    match &link.kind {
        LinkKind::ModbusTcp { address, .. } => {
            let ok = address
                .rsplit_once(':')
                .is_some_and(|(host, port)| !host.is_empty() && port.parse::<u16>().is_ok_and(|p| p > 0));
            if !ok {
                p.at(&format!("{path}.modbus_tcp"), format!("`{address}` is not a `host:port` address"));
            }
        }
        LinkKind::HttpGet { url, ca_file } => {
            let rest = url.strip_prefix("https://").or_else(|| url.strip_prefix("http://"));
            if rest.is_none_or(|r| r.is_empty() || r.starts_with('/')) {
                p.at(&format!("{path}.http_get"), format!("`{url}` is not an http:// or https:// URL"));
            } else if ca_file.is_some() && !url.starts_with("https://") {
                p.at(&format!("{path}.ca_file"), format!("is for https:// links; `{url}` is plain http"));
            }
        }
    }
}

fn validate_tag(config: &Config, tag: &super::Tag, p: &Problems) {
    let path = format!("tags.{}", tag.name);
    if !is_identifier(&tag.name) {
        p.at(
            &path,
            format!("tag name `{}` must match [a-z][a-z0-9_]* to be usable in expressions", tag.name),
        );
    } else if crate::expr::Expr::parse(&tag.name).is_err() {
        p.at(&path, format!("`{}` is a function name in expressions; pick another tag name", tag.name));
    }
    let link = config.link(&tag.link);
    match (&tag.source, link.map(|l| &l.kind)) {
        (_, None) => p.at(&format!("{path}.link"), format!("there is no link `{}` in [links]", tag.link)),
        (TagSource::Register { address, codec, .. }, Some(LinkKind::ModbusTcp { .. })) => {
            check_register_fits(*address, codec.kind, &path, p);
            check_codec(codec, &path, p);
        }
        (TagSource::JsonPointer(pointer), Some(LinkKind::HttpGet { .. })) => {
            if let Err(why) = check_json_pointer(pointer) {
                p.at(&format!("{path}.json_pointer"), why);
            }
        }
        (TagSource::Register { .. }, Some(_)) => p.at(
            &format!("{path}.link"),
            format!("`{}` is an HTTP link; registers need a Modbus link", tag.link),
        ),
        (TagSource::JsonPointer(_), Some(_)) => p.at(
            &format!("{path}.link"),
            format!("`{}` is a Modbus link; a json_pointer needs an HTTP link", tag.link),
        ),
    }
}

fn check_register_fits(address: u16, kind: RegisterType, path: &str, p: &Problems) {
    if u32::from(address) + u32::from(kind.width()) > 65536 {
        p.at(path, format!("a {kind} at register {address} runs past the last register 65535"));
    }
}

fn check_codec(codec: &Codec, path: &str, p: &Problems) {
    if codec.scale == 0.0 {
        p.at(&format!("{path}.scale"), "must not be zero");
    }
}

/// RFC 6901: empty, or `/`-separated tokens where `~` is only followed by 0 or 1.
fn check_json_pointer(pointer: &str) -> Result<(), String> {
    if !pointer.is_empty() && !pointer.starts_with('/') {
        return Err(format!(
            "`{pointer}` is not a JSON Pointer: it must be empty or start with `/` (RFC 6901)"
        ));
    }
    let bytes = pointer.as_bytes();
    for (i, b) in bytes.iter().enumerate() {
        if *b == b'~' && !matches!(bytes.get(i + 1), Some(b'0' | b'1')) {
            return Err(format!("`{pointer}`: `~` must be followed by 0 or 1 (RFC 6901 escapes)"));
        }
    }
    Ok(())
}

fn validate_loop(config: &Config, l: &LoopConfig, path: &str, p: &Problems) {
    if !is_loop_name(&l.name) {
        p.at(&format!("{path}.name"), format!("loop name `{}` may only use a-z, 0-9 and `-`", l.name));
    }
    for (i, name) in l.objective.names().iter().enumerate() {
        if config.tag(name).is_none() {
            p.at(
                &format!("{path}.objective"),
                format!("`{name}` at column {} is not a tag defined in [tags]", l.objective.name_column(i)),
            );
        }
    }
    let tick_ok = l.tick_s >= MIN_TICK_S;
    if !tick_ok {
        p.at(
            &format!("{path}.tick_s"),
            format!("must be at least {MIN_TICK_S} s: a tick reads and writes a PLC over the network"),
        );
    }
    if let Some(permit) = &l.permit
        && config.tag(permit).is_none()
    {
        p.at(&format!("{path}.permit"), format!("there is no tag `{permit}` in [tags]"));
    }
    if let Some(m) = &l.model {
        if m.curvature.is_some_and(|c| !(c > 0.0 && c.is_finite())) {
            p.at(&format!("{path}.model.curvature"), "must be greater than zero (it is |d2J/du2|)");
        }
        for (key, value) in
            [("lag_s", m.lag_s), ("dead_time_s", m.dead_time_s), ("noise_std", m.noise_std.unwrap_or(0.0))]
        {
            if !(value >= 0.0 && value.is_finite()) {
                p.at(&format!("{path}.model.{key}"), "must be zero or more");
            }
        }
    }
    match &l.method {
        MethodConfig::Sine { filter } => validate_filter(l, filter, path, tick_ok, p),
        MethodConfig::Newton { filter, newton } => {
            validate_filter(l, filter, path, tick_ok, p);
            validate_newton(l, newton, path, p);
        }
        MethodConfig::Stepwise(s) => validate_stepwise(l, s, path, tick_ok, p),
    }
    validate_watchdog(l, path, p);
    if let Some(hb) = &l.heartbeat {
        match config.link(&hb.link).map(|link| &link.kind) {
            None => {
                p.at(&format!("{path}.heartbeat.link"), format!("there is no link `{}` in [links]", hb.link))
            }
            Some(LinkKind::HttpGet { .. }) => p.at(
                &format!("{path}.heartbeat.link"),
                format!("`{}` is an HTTP link; the heartbeat is a Modbus register", hb.link),
            ),
            Some(LinkKind::ModbusTcp { .. }) => {}
        }
    }
    let mut names = HashSet::new();
    for (i, input) in l.inputs.iter().enumerate() {
        let ipath = format!("{path}.inputs[{i}]");
        if !is_identifier(&input.name) {
            p.at(&format!("{ipath}.name"), format!("input name `{}` must match [a-z][a-z0-9_]*", input.name));
        } else if !names.insert(input.name.as_str()) {
            p.at(
                &format!("{ipath}.name"),
                format!("`{}` is the name of another input of this loop", input.name),
            );
        }
        validate_input(config, l, input, &ipath, p);
    }
    if tick_ok {
        check_dither_frequencies(l, path, p);
    }
    validate_constraints(config, l, path, p);
}

fn validate_constraints(config: &Config, l: &LoopConfig, path: &str, p: &Problems) {
    let mut names = HashSet::new();
    for (i, c) in l.constraints.iter().enumerate() {
        let cpath = format!("{path}.constraints[{i}]");
        if !is_identifier(&c.name) {
            p.at(
                &format!("{cpath}.name"),
                format!("constraint name `{}` must match [a-z][a-z0-9_]*", c.name),
            );
        } else if !names.insert(c.name.as_str()) {
            p.at(
                &format!("{cpath}.name"),
                format!("`{}` is the name of another constraint of this loop", c.name),
            );
        }
        for (k, name) in c.value.names().iter().enumerate() {
            let column = c.value.name_column(k);
            match config.tag(name) {
                None => p.at(
                    &format!("{cpath}.value"),
                    format!("`{name}` at column {column} is not a tag defined in [tags]"),
                ),
                Some(tag) if config.link(&tag.link).is_none() => p.at(
                    &format!("{cpath}.value"),
                    format!(
                        "`{name}` at column {column} reads link `{}`, which is not in [links]: the loop cannot read it",
                        tag.link
                    ),
                ),
                Some(_) => {}
            }
        }
        match &c.handling {
            Handling::Penalty { weight } => {
                if !(*weight > 0.0 && weight.is_finite()) {
                    p.at(&format!("{cpath}.weight"), "must be greater than zero");
                }
            }
            Handling::BackOff { moves, margin } => {
                if *margin < 0.0 {
                    p.at(
                        &format!("{cpath}.margin"),
                        format!(
                            "must be zero or more, not {}: the value is released once this far inside the limit",
                            show(*margin)
                        ),
                    );
                }
                for m in moves {
                    if !l.inputs.iter().any(|input| input.name == m.input) {
                        let known: Vec<&str> = l.inputs.iter().map(|i| i.name.as_str()).collect();
                        p.at(
                            &format!("{cpath}.move.{}", m.input),
                            format!(
                                "`{}` is not an input of this loop (its inputs: {})",
                                m.input,
                                known.join(", ")
                            ),
                        );
                    }
                }
            }
        }
    }
}

fn validate_filter(l: &LoopConfig, f: &Filter, path: &str, tick_ok: bool, p: &Problems) {
    let slowest = slowest_dither_hz(l);
    if f.highpass_hz <= 0.0 {
        p.at(&format!("{path}.filter.highpass_hz"), "must be greater than zero");
    } else if f.highpass_hz >= slowest {
        p.at(
            &format!("{path}.filter.highpass_hz"),
            format!(
                "{} Hz is not below the dither frequency {slowest:.6} Hz; the filter would remove the dither",
                show(f.highpass_hz)
            ),
        );
    }
    if let Some(lp) = f.lowpass_hz {
        let nyquist = 0.5 / l.tick_s;
        if lp <= 0.0 {
            p.at(&format!("{path}.filter.lowpass_hz"), "must be greater than zero");
        } else if tick_ok && lp >= nyquist {
            p.at(
                &format!("{path}.filter.lowpass_hz"),
                format!("{lp} Hz must be below half the tick rate ({nyquist} Hz)"),
            );
        }
    }
    if f.phase_deg.abs() > 360.0 {
        p.at(&format!("{path}.filter.phase_deg"), "must be within -360..360 degrees");
    }
}

fn slowest_dither_hz(l: &LoopConfig) -> f64 {
    l.inputs.iter().filter_map(|i| i.dither).map(|d| d.hz()).fold(f64::INFINITY, f64::min)
}

fn validate_newton(l: &LoopConfig, n: &NewtonConfig, path: &str, p: &Problems) {
    let at = |key: &str| format!("{path}.newton.{key}");
    if !(n.time_constant_s > 0.0 && n.time_constant_s.is_finite()) {
        p.at(&at("time_constant_s"), "must be greater than zero");
    }
    let slowest = slowest_dither_hz(l);
    if !(n.hessian_hz > 0.0 && n.hessian_hz.is_finite()) {
        p.at(&at("hessian_hz"), "must be greater than zero");
    } else if n.hessian_hz >= slowest {
        p.at(
            &at("hessian_hz"),
            format!(
                "{} Hz is not below the dither frequency {slowest:.6} Hz; the curvature estimate must average \
                 over several dither periods",
                show(n.hessian_hz)
            ),
        );
    }
    match n.initial_curvature {
        Some(c) if !(c > 0.0 && c.is_finite()) => {
            p.at(&at("initial_curvature"), "must be greater than zero (it is |d2J/du2|)")
        }
        None if l.curvature().is_none() => p.at(
            &format!("{path}.newton"),
            "initial_curvature is required when [loops.model] curvature is not given",
        ),
        _ => {}
    }
}

fn validate_stepwise(l: &LoopConfig, s: &StepwiseConfig, path: &str, tick_ok: bool, p: &Problems) {
    let at = |key: &str| format!("{path}.stepwise.{key}");
    if !(s.dwell_s.is_finite() && (!tick_ok || s.dwell_s >= 2.0 * l.tick_s)) {
        p.at(
            &at("dwell_s"),
            format!("must be at least two ticks ({} s): one to move, one to read", show(2.0 * l.tick_s)),
        );
    }
    if !(s.average_s.is_finite() && (!tick_ok || s.average_s >= l.tick_s)) {
        p.at(&at("average_s"), format!("must be at least one tick ({} s)", show(l.tick_s)));
    } else if s.average_s > s.dwell_s {
        p.at(
            &at("average_s"),
            format!(
                "{} s is longer than dwell_s ({} s): it averages the end of each dwell",
                show(s.average_s),
                show(s.dwell_s)
            ),
        );
    }
}

fn validate_watchdog(l: &LoopConfig, path: &str, p: &Problems) {
    let w = &l.watchdog;
    if w.stale_after_s <= 0.0 || (l.tick_s > 0.0 && w.stale_after_s < l.tick_s) {
        p.at(
            &format!("{path}.watchdog.stale_after_s"),
            format!("must be at least one tick ({} s)", show(l.tick_s)),
        );
    }
    if let Some(r) = w.objective_range
        && r.min >= r.max
    {
        p.at(&format!("{path}.watchdog.objective_range"), format!("{r} is empty: min must be below max"));
    }
    match (w.recover, w.recover_after_s) {
        (Recover::Auto, None) => {
            p.at(&format!("{path}.watchdog"), "recover = \"auto\" needs `recover_after_s`")
        }
        (Recover::Auto, Some(s)) if s <= 0.0 => {
            p.at(&format!("{path}.watchdog.recover_after_s"), "must be greater than zero")
        }
        (Recover::Manual, Some(_)) => p.at(
            &format!("{path}.watchdog.recover_after_s"),
            "only applies with recover = \"auto\"; with manual recovery an operator leaves fallback",
        ),
        _ => {}
    }
}

fn validate_input(config: &Config, l: &LoopConfig, input: &InputConfig, path: &str, p: &Problems) {
    let w = &input.write;
    match config.link(&w.link).map(|link| &link.kind) {
        None => p.at(&format!("{path}.write.link"), format!("there is no link `{}` in [links]", w.link)),
        Some(LinkKind::HttpGet { .. }) => p.at(
            &format!("{path}.write.link"),
            format!("`{}` is an HTTP link; setpoints are written over Modbus", w.link),
        ),
        Some(LinkKind::ModbusTcp { .. }) => {}
    }
    check_register_fits(w.holding_register, w.codec.kind, &format!("{path}.write"), p);
    check_codec(&w.codec, &format!("{path}.write"), p);

    let (limits, bounds) = (input.limits, input.bounds);
    let limits_ok = limits.min < limits.max;
    if !limits_ok {
        p.at(&format!("{path}.limits"), format!("{limits} is empty: min must be below max"));
    }
    if bounds.min >= bounds.max {
        p.at(&format!("{path}.bounds"), format!("{bounds} is empty: min must be below max"));
    } else if limits_ok && !(limits.contains(bounds.min) && limits.contains(bounds.max)) {
        p.at(&format!("{path}.bounds"), format!("{bounds} reaches outside the limits {limits}"));
    } else if let Some(d) = input.dither
        && bounds.span() < 2.0 * d.amplitude
    {
        p.at(
            &format!("{path}.dither_amplitude"),
            format!("a dither of ±{} does not fit in the bounds {bounds}", show(d.amplitude)),
        );
    } else if let Some(step) = input.step
        && bounds.span() < step
    {
        p.at(
            &format!("{path}.step"),
            format!("a step of {} does not fit in the bounds {bounds}", show(step)),
        );
    }
    if limits_ok && !limits.contains(input.safe) {
        p.at(&format!("{path}.safe"), format!("{} lies outside the limits {limits}", show(input.safe)));
    }
    if limits_ok && let Some(why) = unencodable(&w.codec, limits) {
        p.at(&format!("{path}.write"), why);
    }
    // Common practice, no single source: an integer register needs about ten steps per
    // dither amplitude (or per step), or rounding turns the sine into a square wave and
    // setpoints jump.
    let (moves_by, what) = match (input.dither, input.step) {
        (Some(d), _) => (d.amplitude, "the dither amplitude"),
        (None, Some(step)) => (step, "the step"),
        (None, None) => (0.0, ""),
    };
    let integer = !matches!(w.codec.kind, RegisterType::F32);
    if integer && moves_by > 0.0 && w.codec.scale.abs() > moves_by / 10.0 {
        p.at(
            &format!("{path}.write.scale"),
            format!(
                "a {} register steps by {} while {what} is {}: use a finer scale \
                 (at most {}) or an f32 register",
                w.codec.kind,
                show(w.codec.scale.abs()),
                show(moves_by),
                show(moves_by / 10.0)
            ),
        );
    }
    let mut positive = vec![("max_rate_per_s", input.max_rate_per_s)];
    if let Some(d) = input.dither {
        positive.extend([("dither_amplitude", d.amplitude), ("dither_period_s", d.period_s)]);
    }
    positive.extend(input.gain.map(|g| ("gain", g)));
    positive.extend(input.step.map(|s| ("step", s)));
    for (key, value) in positive {
        if !(value > 0.0 && value.is_finite()) {
            p.at(&format!("{path}.{key}"), "must be greater than zero");
        }
    }
    if let Some(d) = input.dither
        && d.amplitude > 0.0
        && d.period_s > 0.0
    {
        let dither_rate = 2.0 * std::f64::consts::PI * d.amplitude / d.period_s;
        if input.max_rate_per_s > 0.0 && dither_rate > input.max_rate_per_s {
            p.at(
                &format!("{path}.max_rate_per_s"),
                format!(
                    "{} per s is below the dither's own rate 2*pi*a/P = {dither_rate:.6} per s; \
                     lower dither_amplitude or lengthen dither_period_s",
                    show(input.max_rate_per_s)
                ),
            );
        }
        if l.tick_s > 0.0 && d.period_s / l.tick_s < 8.0 {
            p.at(
                &format!("{path}.dither_period_s"),
                format!(
                    "{} s is only {:.1} ticks of {} s; the dither needs at least 8 ticks per period",
                    show(d.period_s),
                    d.period_s / l.tick_s,
                    show(l.tick_s)
                ),
            );
        }
    }
    if let (Some(step), MethodConfig::Stepwise(s)) = (input.step, &l.method)
        && step > 0.0
        && input.max_rate_per_s > 0.0
        && s.average_s <= s.dwell_s
    {
        // The step must be complete before the averaging starts, or the comparison
        // judges a ramp rather than a level.
        let ramp_s = step / input.max_rate_per_s;
        if ramp_s > s.dwell_s - s.average_s {
            p.at(
                &format!("{path}.step"),
                format!(
                    "a step of {} at max_rate_per_s = {} takes {} s, longer than dwell_s - average_s = {} s: \
                     the objective would be averaged while the input still moves",
                    show(step),
                    show(input.max_rate_per_s),
                    show(ramp_s),
                    show(s.dwell_s - s.average_s)
                ),
            );
        }
    }
}

/// Whether the limits can be written in the register type at all, after scaling.
fn unencodable(codec: &Codec, limits: super::Range) -> Option<String> {
    let (lo, hi) = match codec.kind {
        RegisterType::U16 => (0.0, f64::from(u16::MAX)),
        RegisterType::I16 => (f64::from(i16::MIN), f64::from(i16::MAX)),
        RegisterType::U32 => (0.0, f64::from(u32::MAX)),
        RegisterType::I32 => (f64::from(i32::MIN), f64::from(i32::MAX)),
        RegisterType::F32 => (-f64::from(f32::MAX), f64::from(f32::MAX)),
    };
    if codec.scale == 0.0 {
        return None;
    }
    let raw = |v: f64| (v - codec.offset) / codec.scale;
    let bad: Vec<_> =
        [limits.min, limits.max].into_iter().filter(|&v| !(lo..=hi).contains(&raw(v))).collect();
    (!bad.is_empty()).then(|| {
        format!(
            "the limits {limits} cannot be written as {} with scale {} and offset {} (raw value out of range for {:?})",
            codec.kind,
            show(codec.scale),
            show(codec.offset),
            bad
        )
    })
}

/// Dither frequencies must stay apart after folding at the tick rate, or the
/// demodulation of one input picks up another's dither (or its own harmonic).
fn check_dither_frequencies(l: &LoopConfig, path: &str, p: &Problems) {
    let fs = 1.0 / l.tick_s;
    let fold = |f: f64| {
        let r = f.rem_euclid(fs);
        r.min(fs - r)
    };
    let same = |a: f64, b: f64| (fold(a) - fold(b)).abs() <= 1e-9 * fs;
    let Some(f) = l.inputs.iter().map(|i| i.dither.map(|d| d.hz())).collect::<Option<Vec<f64>>>() else {
        return;
    };
    if f.iter().any(|x| !x.is_finite() || *x <= 0.0) {
        return;
    }
    // Newton demodulates the curvature at 2f_j too, so a dither at 3f_j collides with it.
    let newton = matches!(l.method, MethodConfig::Newton { .. });
    let at = |i: usize| format!("{path}.inputs[{i}].dither_period_s");
    let name = |i: usize| &l.inputs[i].name;
    for i in 0..f.len() {
        if same(f[i], fs / 2.0) {
            p.at(
                &at(i),
                format!("a dither at {} Hz sits at half the tick rate and cannot be demodulated", f[i]),
            );
        }
        for j in 0..f.len() {
            if i == j {
                continue;
            }
            if i < j && same(f[i], f[j]) {
                p.at(
                    &at(j),
                    format!(
                        "the dither of `{}` has the same frequency as `{}` after folding at the tick rate",
                        name(j),
                        name(i)
                    ),
                );
            }
            if same(2.0 * f[i], f[j]) {
                p.at(
                    &at(j),
                    format!(
                        "the dither of `{}` collides with twice the dither frequency of `{}`",
                        name(j),
                        name(i)
                    ),
                );
            }
            if newton && same(3.0 * f[i], f[j]) {
                p.at(
                    &at(j),
                    format!(
                        "the dither of `{}` collides with three times the dither frequency of `{}`, which the \
                         curvature estimate of method = \"newton\" cannot tell apart",
                        name(j),
                        name(i)
                    ),
                );
            }
            for k in 0..f.len() {
                if k == i || k == j || i > j {
                    continue;
                }
                if same(f[i] + f[j], f[k]) {
                    p.at(
                        &at(k),
                        format!(
                            "the dither of `{}` collides with the sum of those of `{}` and `{}`",
                            name(k),
                            name(i),
                            name(j)
                        ),
                    );
                }
                if same((f[i] - f[j]).abs(), f[k]) {
                    p.at(
                        &at(k),
                        format!(
                            "the dither of `{}` collides with the difference of those of `{}` and `{}`",
                            name(k),
                            name(i),
                            name(j)
                        ),
                    );
                }
            }
        }
    }
}

/// Two inputs writing overlapping registers on one link would fight each other (across
/// loops too, unless each loop has a plant of its own).
fn check_write_collisions(config: &Config, p: &Problems, across_loops: bool) {
    let mut owners: HashMap<(&str, u32), String> = HashMap::new();
    for (li, l) in config.loops.iter().enumerate() {
        if !across_loops {
            owners.clear();
        }
        let mut claims: Vec<(String, &str, u16, u16)> = l
            .inputs
            .iter()
            .enumerate()
            .map(|(ii, input)| {
                (
                    format!("loops[{li}].inputs[{ii}].write"),
                    input.write.link.as_str(),
                    input.write.holding_register,
                    input.write.codec.kind.width(),
                )
            })
            .collect();
        if let Some(hb) = &l.heartbeat {
            claims.push((format!("loops[{li}].heartbeat"), hb.link.as_str(), hb.holding_register, 1));
        }
        for (path, link, start, width) in claims {
            let registers = u32::from(start)..u32::from(start) + u32::from(width);
            if let Some(reg) = registers.clone().find(|reg| owners.contains_key(&(link, *reg))) {
                p.at(
                    &path,
                    format!("register {reg} on link `{link}` is already written by {}", owners[&(link, reg)]),
                );
            }
            for reg in registers {
                owners.entry((link, reg)).or_insert_with(|| path.clone());
            }
        }
    }
}
