//! A loop's constraints, judged each tick before the core steps: their values from the
//! tags, whether each is engaged, the penalty the core's objective carries, and which
//! way a back-off walks each input. Pure; time is passed in.
//!
//! A constraint engages as soon as its value is past the limit. It is released only once
//! the value has stayed inside for one cycle of the loop's method (the longest dither
//! period, or a stepwise dwell), `margin` inside for a back-off. A back-off walks its
//! inputs while the value is past the limit and holds them, without dither, once it is
//! back inside, so the plant answers the last move before seeking resumes; a value that
//! stays inside but short of `margin` for a whole cycle sets the walk going again until
//! it is `margin` inside. Noise at the limit cannot make a constraint flap: each
//! engagement lasts at least one cycle.

use crate::config::{ConstraintConfig, Direction, Handling, HandlingKind, Limit, LoopConfig};
use crate::expr::Expr;

/// A constraint's state as status, metrics and history show it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConstraintView<'a> {
    pub name: &'a str,
    /// The value at the last tick whose tags were read; `None` before or after a failed read.
    pub value: Option<f64>,
    pub limit: Limit,
    pub handling: HandlingKind,
    pub engaged: bool,
}

/// A constraint engaged or released at a tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Change {
    /// Index into the loop's constraints, in config order.
    pub constraint: usize,
    pub engaged: bool,
    pub value: f64,
    pub limit: f64,
}

/// Every constraint of one loop.
#[derive(Debug, Clone)]
pub struct Constraints {
    /// The loop's tags, in [`loop_tags`] order.
    tags: Vec<String>,
    items: Vec<Item>,
    /// +1 when the loop maximizes, -1 when it minimizes.
    sign: f64,
    /// How long a value must stay inside before its constraint is released.
    release_after_s: f64,
    /// Per input, the way a back-off walks it this tick: +1, -1, or 0 to hold.
    walk: Vec<f64>,
    changes: Vec<Change>,
}

#[derive(Debug, Clone)]
struct Item {
    name: String,
    value: Expr,
    /// Where each of the value's names sits in the loop's tags.
    slots: Vec<usize>,
    scratch: Vec<f64>,
    limit: Limit,
    handling: Act,
    current: Option<f64>,
    engaged: bool,
    /// Since when the value has been inside (`margin` inside, for a back-off) while engaged.
    inside_since_s: Option<f64>,
    /// Since when a back-off's value has been inside the limit but short of `margin`.
    short_since_s: Option<f64>,
    /// Whether a back-off walks its inputs this tick.
    walking: bool,
}

#[derive(Debug, Clone)]
enum Act {
    Penalty {
        weight: f64,
    },
    /// (input index, +1 or -1) per input to walk.
    BackOff {
        moves: Vec<(usize, f64)>,
        margin: f64,
    },
}

/// The tags a loop reads each tick: the objective's names, then those of its constraints
/// that the objective does not use, each once.
fn loop_tags(config: &LoopConfig) -> Vec<String> {
    let mut tags: Vec<String> = config.objective.names().to_vec();
    for c in &config.constraints {
        for name in c.value.names() {
            if !tags.contains(name) {
                tags.push(name.clone());
            }
        }
    }
    tags
}

impl Constraints {
    /// The constraints of a validated loop, reading from tags in [`loop_tags`] order.
    pub fn new(config: &LoopConfig) -> Self {
        let tags = loop_tags(config);
        let items = config.constraints.iter().map(|c| Item::new(c, config, &tags)).collect();
        Constraints {
            tags,
            items,
            sign: match config.direction {
                Direction::Maximize => 1.0,
                Direction::Minimize => -1.0,
            },
            release_after_s: config.cycle_s(),
            walk: vec![0.0; config.inputs.len()],
            changes: Vec::new(),
        }
    }

    /// Every tag the loop reads, in [`loop_tags`] order: values come in this order.
    pub fn tag_names(&self) -> &[String] {
        &self.tags
    }

    pub fn is_empty(&self) -> bool {
        self.items.is_empty()
    }

    /// Evaluates every value from this tick's tags (in [`loop_tags`] order). Returns the
    /// index of the first value that is not a finite number, if any.
    pub fn evaluate(&mut self, tags: &[f64]) -> Option<usize> {
        let mut not_finite = None;
        for (k, item) in self.items.iter_mut().enumerate() {
            let v = item.eval(tags);
            item.current = Some(v);
            if !v.is_finite() && not_finite.is_none() {
                not_finite = Some(k);
            }
        }
        not_finite
    }

    /// The tags could not be read: no value is known this tick.
    pub fn forget(&mut self) {
        for item in &mut self.items {
            item.current = None;
        }
    }

    /// Engages and releases on this tick's values at `now_s`; a value that is unknown or
    /// not finite changes nothing (the watchdog judges those).
    pub fn judge(&mut self, now_s: f64) {
        for (k, item) in self.items.iter_mut().enumerate() {
            let Some(v) = item.current.filter(|v| v.is_finite()) else { continue };
            let excess = item.limit.excess(v);
            let margin = match item.handling {
                Act::BackOff { margin, .. } => margin,
                Act::Penalty { .. } => 0.0,
            };
            let change = |engaged| Change { constraint: k, engaged, value: v, limit: item.limit.value() };
            if excess > 0.0 {
                (item.inside_since_s, item.short_since_s, item.walking) = (None, None, true);
                if !item.engaged {
                    item.engaged = true;
                    self.changes.push(change(true));
                }
            } else if !item.engaged {
                item.walking = false;
            } else if excess <= -margin {
                (item.short_since_s, item.walking) = (None, false);
                let since = *item.inside_since_s.get_or_insert(now_s);
                if now_s - since >= self.release_after_s {
                    item.engaged = false;
                    item.inside_since_s = None;
                    self.changes.push(change(false));
                }
            } else {
                // Inside the limit but short of `margin`: held while the plant answers the
                // last move; walked on once that has lasted a cycle (and until `margin`
                // inside).
                item.inside_since_s = None;
                let since = *item.short_since_s.get_or_insert(now_s);
                item.walking = now_s - since >= self.release_after_s;
            }
        }
    }

    /// The objective the core sees: `objective` worsened by `weight * excess^2` for each
    /// penalty constraint past its limit.
    pub fn penalized(&self, objective: f64) -> f64 {
        let penalty: f64 = self
            .items
            .iter()
            .filter_map(|item| match (&item.handling, item.current) {
                (Act::Penalty { weight }, Some(v)) => Some(weight * item.limit.excess(v).max(0.0).powi(2)),
                _ => None,
            })
            .sum();
        objective - self.sign * penalty
    }

    /// Whether every value evaluated last is a finite number within its limit.
    pub fn all_respected(&self) -> bool {
        self.items.iter().all(|i| i.current.is_some_and(|v| v.is_finite() && i.limit.excess(v) <= 0.0))
    }

    /// Whether a back-off constraint is engaged.
    pub fn backing_off(&self) -> bool {
        self.items.iter().any(|i| i.engaged && matches!(i.handling, Act::BackOff { .. }))
    }

    /// Whether any constraint is handled by a penalty.
    pub fn has_penalty(&self) -> bool {
        self.items.iter().any(|i| matches!(i.handling, Act::Penalty { .. }))
    }

    /// While a back-off is engaged: the way to walk each input this tick (+1, -1, or 0 to
    /// hold). An input walks while a constraint naming it walks (see the module's
    /// docs); two constraints walking it opposite ways hold it. `None` while no back-off is
    /// engaged: the loop seeks.
    pub fn walk(&mut self) -> Option<&[f64]> {
        self.walk.fill(0.0);
        let mut engaged = false;
        for item in &self.items {
            if let (Act::BackOff { moves, .. }, true) = (&item.handling, item.engaged) {
                engaged = true;
                if item.walking {
                    for &(input, way) in moves {
                        self.walk[input] += way;
                    }
                }
            }
        }
        for w in &mut self.walk {
            *w = if *w > 0.0 {
                1.0
            } else if *w < 0.0 {
                -1.0
            } else {
                0.0
            };
        }
        engaged.then_some(&self.walk[..])
    }

    /// The constraints engaged or released since last asked, oldest first.
    pub fn take_changes(&mut self) -> Vec<Change> {
        std::mem::take(&mut self.changes)
    }

    /// Each constraint as it stands, in config order.
    pub fn views(&self) -> impl ExactSizeIterator<Item = ConstraintView<'_>> + '_ {
        self.items.iter().map(|i| ConstraintView {
            name: &i.name,
            value: i.current,
            limit: i.limit,
            handling: match i.handling {
                Act::Penalty { .. } => HandlingKind::Penalty,
                Act::BackOff { .. } => HandlingKind::BackOff,
            },
            engaged: i.engaged,
        })
    }

    /// The name of constraint `k`.
    pub fn name(&self, k: usize) -> &str {
        self.items.get(k).map_or("", |i| i.name.as_str())
    }
}

impl Item {
    fn new(c: &ConstraintConfig, config: &LoopConfig, tags: &[String]) -> Self {
        let slots: Vec<usize> =
            c.value.names().iter().map(|n| tags.iter().position(|t| t == n).unwrap_or(0)).collect();
        let handling = match &c.handling {
            Handling::Penalty { weight } => Act::Penalty { weight: *weight },
            Handling::BackOff { moves, margin } => Act::BackOff {
                moves: moves
                    .iter()
                    .filter_map(|m| {
                        let input = config.inputs.iter().position(|i| i.name == m.input)?;
                        Some((input, m.way.sign()))
                    })
                    .collect(),
                margin: *margin,
            },
        };
        Item {
            name: c.name.clone(),
            value: c.value.clone(),
            scratch: vec![0.0; slots.len()],
            slots,
            limit: c.limit,
            handling,
            current: None,
            engaged: false,
            inside_since_s: None,
            short_since_s: None,
            walking: false,
        }
    }

    fn eval(&mut self, tags: &[f64]) -> f64 {
        for (value, &slot) in self.scratch.iter_mut().zip(&self.slots) {
            *value = tags.get(slot).copied().unwrap_or(f64::NAN);
        }
        self.value.eval(&self.scratch)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A loop maximizing `y` on input `u` (a 20 s dither: constraints are released after
    /// 20 s inside), with the given `[[loops.constraints]]` tables.
    fn constraints(tables: &str) -> Constraints {
        let text = format!(
            "[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n\
             [tags.y]\nlink = \"plc\"\ninput_register = 0\ntype = \"f32\"\n\
             [tags.co]\nlink = \"plc\"\ninput_register = 2\ntype = \"f32\"\n\
             [tags.t]\nlink = \"plc\"\ninput_register = 4\ntype = \"f32\"\n\
             [[loops]]\nname = \"l\"\nobjective = \"y\"\ndirection = \"maximize\"\ntick_s = 1.0\n\
             [loops.filter]\nhighpass_hz = 0.01\n[loops.watchdog]\nstale_after_s = 5\n\
             [[loops.inputs]]\nname = \"u\"\nwrite = {{ link = \"plc\", holding_register = 0, type = \"f32\" }}\n\
             limits = [0, 6]\nbounds = [1, 5]\nsafe = 2\nmax_rate_per_s = 1\ndither_amplitude = 0.1\n\
             dither_period_s = 20\ngain = 0.01\n{tables}"
        );
        let config = crate::config::parse(&text, "test").expect("valid");
        Constraints::new(&config.loops[0])
    }

    const BACK_OFF: &str = "[[loops.constraints]]\nname = \"co\"\nvalue = \"co\"\nmax = 150\n\
                            handling = \"back_off\"\nmove = { u = \"up\" }\nmargin = 10\n";

    /// Tags in loop order: y, co, t.
    fn tick(c: &mut Constraints, now_s: f64, co: f64) {
        assert_eq!(c.evaluate(&[1.0, co, 20.0]), None);
        c.judge(now_s);
    }

    #[test]
    fn the_loop_reads_the_objectives_tags_first_and_each_constraint_tag_once() {
        let text = "[[loops.constraints]]\nname = \"hot\"\nvalue = \"t + co - y\"\nmax = 1\n\
                    handling = \"penalty\"\nweight = 1\n";
        let c = constraints(&format!("{BACK_OFF}{text}"));
        assert_eq!(c.items[1].slots, vec![2, 1, 0], "t, co, y in the expression's own order");
    }

    #[test]
    fn a_back_off_walks_past_the_limit_holds_once_inside_and_releases_a_cycle_after_margin_inside() {
        let mut c = constraints(BACK_OFF);
        tick(&mut c, 0.0, 140.0);
        assert_eq!(c.walk(), None, "inside the limit: seek");
        tick(&mut c, 1.0, 151.0);
        assert_eq!(c.walk(), Some(&[1.0][..]), "past the limit: walk up");
        assert_eq!(
            c.take_changes(),
            vec![Change { constraint: 0, engaged: true, value: 151.0, limit: 150.0 }]
        );
        tick(&mut c, 2.0, 145.0);
        assert_eq!(c.walk(), Some(&[0.0][..]), "inside, not yet margin inside: hold while the plant answers");
        tick(&mut c, 3.0, 140.0);
        assert_eq!(c.walk(), Some(&[0.0][..]), "margin inside: hold");
        tick(&mut c, 22.0, 139.0);
        assert_eq!(c.walk(), Some(&[0.0][..]), "19 s of the 20 s cycle");
        assert!(c.take_changes().is_empty());
        tick(&mut c, 23.0, 139.0);
        assert_eq!(c.walk(), None, "released: seek again");
        assert_eq!(
            c.take_changes(),
            vec![Change { constraint: 0, engaged: false, value: 139.0, limit: 150.0 }]
        );
    }

    #[test]
    fn a_value_that_stays_short_of_the_margin_for_a_cycle_sets_the_walk_going_again() {
        let mut c = constraints(BACK_OFF);
        tick(&mut c, 0.0, 151.0);
        for n in 1..21 {
            tick(&mut c, n as f64, 145.0);
            assert_eq!(c.walk(), Some(&[0.0][..]), "held at {n} s");
        }
        tick(&mut c, 21.0, 145.0);
        assert_eq!(c.walk(), Some(&[1.0][..]), "a cycle short of the margin: walk on");
        tick(&mut c, 22.0, 141.0);
        assert_eq!(c.walk(), Some(&[1.0][..]), "until margin inside");
        tick(&mut c, 23.0, 139.0);
        assert_eq!(c.walk(), Some(&[0.0][..]));
    }

    #[test]
    fn noise_at_the_limit_does_not_make_a_constraint_flap() {
        let mut c = constraints(BACK_OFF);
        let mut engagements = 0;
        for n in 0..1000 {
            // Alternately 5 past the limit and 15 inside it, every tick.
            let co = if n % 2 == 0 { 155.0 } else { 135.0 };
            tick(&mut c, n as f64, co);
            engagements += c.take_changes().iter().filter(|ch| ch.engaged).count();
        }
        assert_eq!(engagements, 1, "engaged once, never released while the value keeps crossing");
    }

    #[test]
    fn a_penalty_worsens_the_objective_by_weight_times_excess_squared_only_past_the_limit() {
        let text = "[[loops.constraints]]\nname = \"cool\"\nvalue = \"t\"\nmin = 25\n\
                    handling = \"penalty\"\nweight = 0.5\n";
        let mut c = constraints(text);
        // Tags y, t: this loop reads no `co`.
        assert_eq!(c.evaluate(&[1.0, 22.0]), None);
        assert_eq!(c.penalized(10.0), 10.0 - 0.5 * 9.0, "3 below the minimum");
        assert_eq!(c.evaluate(&[1.0, 26.0]), None);
        assert_eq!(c.penalized(10.0), 10.0);
        assert_eq!(c.walk(), None, "a penalty never walks");
    }

    #[test]
    fn a_value_that_is_not_a_number_is_reported_by_index() {
        let text = "[[loops.constraints]]\nname = \"ratio\"\nvalue = \"co / (t - 20)\"\nmax = 1\n\
                    handling = \"penalty\"\nweight = 1\n";
        let mut c = constraints(&format!("{BACK_OFF}{text}"));
        assert_eq!(c.evaluate(&[1.0, 100.0, 20.0]), Some(1));
    }

    #[test]
    fn opposite_walks_of_one_input_hold_it() {
        let text = "[[loops.constraints]]\nname = \"cold\"\nvalue = \"t\"\nmin = 25\n\
                    handling = \"back_off\"\nmove = { u = \"down\" }\n";
        let mut c = constraints(&format!("{BACK_OFF}{text}"));
        assert_eq!(c.evaluate(&[1.0, 160.0, 20.0]), None);
        c.judge(0.0);
        assert_eq!(c.walk(), Some(&[0.0][..]));
    }
}
