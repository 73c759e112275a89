//! The status page for people: one table row per loop input, refreshed every few seconds.

use axum::extract::State;
use axum::response::Html;

use super::{ApiState, Reader};

fn escape(text: &str) -> String {
    text.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

fn num(v: Option<f64>) -> String {
    v.filter(|x| x.is_finite()).map_or_else(|| "–".to_owned(), |x| format!("{x:.4}"))
}

/// Each constraint as `name value max 150 ENGAGED`, one per line; the word says it, not
/// only the colour.
fn constraints(list: &[crate::supervisor::status::ConstraintStatus]) -> String {
    list.iter()
        .map(|c| {
            format!(
                "<span class=\"{}\">{} {} {} {}{}</span>",
                if c.engaged { "engaged" } else { "clear" },
                escape(&c.name),
                num(c.value),
                c.side,
                num(Some(c.limit)),
                if c.engaged { " ENGAGED" } else { "" }
            )
        })
        .collect::<Vec<_>>()
        .join("<br>")
}

pub async fn status_page(State(state): State<ApiState>, _: Reader) -> Html<String> {
    let mut rows = String::new();
    for handle in state.loops.iter() {
        let s = handle.status.borrow().clone();
        // A stepwise loop's dwell phase, beside its state.
        let dwell = s.dwell.as_ref().map_or_else(String::new, |d| format!(" ({})", escape(d.phase)));
        for (k, i) in s.inputs.iter().enumerate() {
            let loop_cells = if k == 0 {
                let span = s.inputs.len();
                format!(
                    "<td rowspan=\"{span}\">{}</td><td rowspan=\"{span}\" class=\"{}\">{}{dwell}</td><td rowspan=\"{span}\">{}</td><td rowspan=\"{span}\">{}</td><td rowspan=\"{span}\">{}</td>",
                    escape(&s.name),
                    escape(s.state),
                    escape(s.state),
                    escape(s.mode),
                    num(s.objective),
                    constraints(&s.constraints)
                )
            } else {
                String::new()
            };
            // Newton's curvature estimate, beside the gradient.
            let curvature = i.curvature.map_or_else(String::new, |c| {
                format!(
                    " (curvature {}{})",
                    num(Some(c.estimate)),
                    if c.trusted { "" } else { ", untrusted" }
                )
            });
            rows.push_str(&format!(
                "<tr>{loop_cells}<td>{}</td><td>{}</td><td>{}</td><td>{}{curvature}</td><td>{} … {}</td><td>{}</td></tr>\n",
                escape(&i.name),
                num(Some(i.applied)),
                num(Some(i.estimate)),
                num(Some(i.gradient)),
                num(Some(i.bounds.min)),
                num(Some(i.bounds.max)),
                num(Some(i.safe)),
            ));
        }
    }
    Html(format!(
        r#"<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta http-equiv="refresh" content="5">
<title>Ridgeline</title>
<style>
body {{ font-family: sans-serif; margin: 2em; color: #222; }}
table {{ border-collapse: collapse; }}
th, td {{ border: 1px solid #ccc; padding: 0.3em 0.7em; text-align: right; }}
th {{ background: #f2f2f2; }}
td:first-child {{ text-align: left; }}
.fallback, .no_permit {{ background: #fdd; }}
.testing {{ background: #ffd; }}
.seeking {{ background: #dfd; }}
.engaged {{ font-weight: bold; background: #fed; }}
</style></head>
<body>
<h1>Ridgeline</h1>
<p>Loops and their inputs; this page refreshes every 5 s. Machine-readable: <a href="/api/v1/loops">/api/v1/loops</a>, <a href="/metrics">/metrics</a>.</p>
<table>
<tr><th>loop</th><th>state</th><th>mode</th><th>objective</th><th>constraints</th><th>input</th><th>applied</th><th>estimate</th><th>gradient</th><th>bounds</th><th>safe</th></tr>
{rows}</table>
</body></html>
"#
    ))
}
