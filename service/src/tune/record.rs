//! A record of (time, applied setpoint, objective) to fit, read from CSV text: the API's
//! samples CSV, or any CSV with a time column `at` (RFC 3339) or `t_s` (seconds), an
//! `objective` column and the input's `<input>.applied` column.

use crate::history::parse_rfc3339;

/// Rows in time order; a missing objective is NaN (it is left out of the fit, but the
/// setpoint still drives the model).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Record {
    pub t_s: Vec<f64>,
    pub u: Vec<f64>,
    pub y: Vec<f64>,
}

impl Record {
    pub fn len(&self) -> usize {
        self.t_s.len()
    }

    pub fn is_empty(&self) -> bool {
        self.t_s.is_empty()
    }

    pub fn push(&mut self, t_s: f64, u: f64, y: f64) {
        self.t_s.push(t_s);
        self.u.push(u);
        self.y.push(y);
    }

    /// The median time between rows: the record's tick.
    pub fn median_step_s(&self) -> Option<f64> {
        let mut steps: Vec<f64> = self.t_s.windows(2).map(|w| w[1] - w[0]).collect();
        if steps.is_empty() {
            return None;
        }
        steps.sort_by(f64::total_cmp);
        Some(steps[steps.len() / 2])
    }
}

/// What is wrong with a CSV record.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RecordError {
    #[error("the CSV has no column `{column}`{hint} (its columns: {found})")]
    MissingColumn { column: String, hint: &'static str, found: String },
    #[error("row {row}, column `{column}`: {why}")]
    Cell { row: usize, column: String, why: String },
    #[error(
        "row {row} is at {t_s} s, not after the row before it (at {previous_s} s): rows must be in time order"
    )]
    NotIncreasing { row: usize, t_s: f64, previous_s: f64 },
    #[error("the CSV cannot be read: {0}")]
    Csv(String),
}

/// Reads the record of input `input` from CSV text. Rows without an applied setpoint
/// (before the loop wrote one) are left out; a row without an objective is kept with NaN.
pub fn read_csv(text: &str, input: &str) -> Result<Record, RecordError> {
    let mut reader = csv::ReaderBuilder::new().trim(csv::Trim::All).from_reader(text.as_bytes());
    let headers = reader.headers().map_err(|e| RecordError::Csv(e.to_string()))?.clone();
    let find = |name: &str| headers.iter().position(|h| h == name);
    let found = || headers.iter().collect::<Vec<_>>().join(", ");
    let missing =
        |column: &str, hint| RecordError::MissingColumn { column: column.to_owned(), hint, found: found() };
    let (time, rfc3339) = match (find("at"), find("t_s")) {
        (Some(at), _) => (at, true),
        (None, Some(t)) => (t, false),
        (None, None) => return Err(missing("at", " or `t_s`")),
    };
    let objective = find("objective").ok_or_else(|| missing("objective", ""))?;
    let applied_name = format!("{input}.applied");
    let applied =
        find(&applied_name).ok_or_else(|| missing(&applied_name, " (is the input named right?)"))?;
    let mut record = Record::default();
    let mut origin_ms = None;
    for (n, row) in reader.records().enumerate() {
        // Row 1 is the header, as a spreadsheet would number it.
        let row_number = n + 2;
        let row = row.map_err(|e| RecordError::Csv(e.to_string()))?;
        let cell = |i: usize| row.get(i).unwrap_or("");
        let number = |i: usize| -> Result<Option<f64>, RecordError> {
            let text = cell(i);
            if text.is_empty() {
                return Ok(None);
            }
            match text.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(Some(v)),
                _ => Err(RecordError::Cell {
                    row: row_number,
                    column: headers.get(i).unwrap_or("").to_owned(),
                    why: format!("`{text}` is not a finite number"),
                }),
            }
        };
        let t_s = if rfc3339 {
            let ms = parse_rfc3339(cell(time)).map_err(|why| RecordError::Cell {
                row: row_number,
                column: "at".into(),
                why,
            })?;
            (ms - *origin_ms.get_or_insert(ms)) as f64 / 1000.0
        } else {
            number(time)?.ok_or_else(|| RecordError::Cell {
                row: row_number,
                column: "t_s".into(),
                why: "the time is empty".into(),
            })?
        };
        let Some(u) = number(applied)? else { continue };
        let y = number(objective)?.unwrap_or(f64::NAN);
        if let Some(&previous_s) = record.t_s.last()
            && t_s <= previous_s
        {
            return Err(RecordError::NotIncreasing { row: row_number, t_s, previous_s });
        }
        record.push(t_s, u, y);
    }
    Ok(record)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_apis_samples_csv_is_read_with_times_from_the_first_row() {
        let text = "at,objective,state,u.applied,u.estimate,u.gradient\n\
                    2026-12-01T10:00:00Z,1.5,holding,2,2,0\n\
                    2026-12-01T10:00:01.500Z,,testing,2.5,2,0\n\
                    2026-12-01T10:00:03Z,1.75,testing,2.5,2,0\n";
        let r = read_csv(text, "u").unwrap();
        assert_eq!(r.t_s, vec![0.0, 1.5, 3.0]);
        assert_eq!(r.u, vec![2.0, 2.5, 2.5]);
        assert!(r.y[1].is_nan() && r.y[2] == 1.75);
    }

    #[test]
    fn problems_name_the_column_and_the_row() {
        let e = read_csv("t_s,objective\n0,1\n", "u").unwrap_err().to_string();
        assert!(e.contains("no column `u.applied`") && e.contains("t_s, objective"), "{e}");
        let e = read_csv("t_s,objective,u.applied\n0,1,2\n1,x,2\n", "u").unwrap_err().to_string();
        assert_eq!(e, "row 3, column `objective`: `x` is not a finite number");
        let e = read_csv("t_s,objective,u.applied\n0,1,2\n0,1,2\n", "u").unwrap_err().to_string();
        assert!(e.contains("row 3") && e.contains("time order"), "{e}");
        let e = read_csv("time,objective,u.applied\n", "u").unwrap_err().to_string();
        assert!(e.contains("`at` or `t_s`"), "{e}");
    }
}
