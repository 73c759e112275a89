//! The compact sample layout: a loop's consecutive samples packed into blocks of binary
//! records, so a tick costs its values and little more. Pure: bytes in, bytes out.
//!
//! A block is one row of `sample_blocks` (sealed) or `open_blocks` (still filling), keyed
//! by (loop, first_ms). Its `layout` names the inputs and constraints its samples carry, as
//! ids of the `names` table:
//!
//! ```text
//! layout = varint n_inputs, n_inputs x varint name_id, varint n_constraints, n_constraints x varint name_id
//! data   = sample*
//! sample = varint (zigzag(dt_ms) << 1 | changed)
//!              dt_ms: from the block's first_ms for the first sample, else from the previous sample
//!              changed: 1 when the state or phase differs from the previous sample's (always
//!              1 for the first), and then:
//!          [varint state_id, varint phase_id (0 for none)]
//!          f64 LE objective (NaN for none)
//!          per input: f64 LE applied, estimate, gradient
//!          per constraint: f64 LE value
//! ```
//!
//! A value that is not finite is stored as NaN and read back as `None`, as JSON `null` was.
//! Within a block times never go back, and they span less than a minute.

use super::HistoryError;

/// Largest block, in bytes of samples: with its key and layout a block stays within what
/// a 4 KiB SQLite page keeps inline for an index-organised row (1,002 bytes), so no block
/// spills into overflow pages, and four of them nearly fill a page.
pub(super) const MAX_BLOCK_BYTES: usize = 980;
/// Longest time from a block's first sample to its last: reads of a time range look this
/// far back for blocks that reach into it.
pub(super) const MAX_BLOCK_SPAN_MS: i64 = 60_000;

/// The names a block's samples carry values for, as `names` ids.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub(super) struct Layout {
    pub inputs: Vec<i64>,
    pub constraints: Vec<i64>,
}

impl Layout {
    #[cfg(test)]
    pub fn encode(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(2 + self.inputs.len() + self.constraints.len());
        self.encode_into(&mut out);
        out
    }

    /// Encodes into `out`, replacing what it held.
    pub fn encode_into(&self, out: &mut Vec<u8>) {
        out.clear();
        for ids in [&self.inputs, &self.constraints] {
            put_varint(out, ids.len() as u64);
            for &id in ids {
                put_varint(out, id as u64);
            }
        }
    }

    pub fn decode(bytes: &[u8]) -> Result<Layout, HistoryError> {
        let mut r = Reader { bytes, at: 0 };
        let mut list = || -> Result<Vec<i64>, HistoryError> {
            let n = r.varint()?;
            if n > bytes.len() as u64 {
                return Err(corrupt("a block layout lists more names than it has bytes"));
            }
            (0..n).map(|_| r.varint().map(|id| id as i64)).collect()
        };
        let layout = Layout { inputs: list()?, constraints: list()? };
        if r.at != bytes.len() {
            return Err(corrupt("a block layout has bytes left over"));
        }
        Ok(layout)
    }

    /// How many values each sample carries: the objective, three per input, one per constraint.
    pub fn width(&self) -> usize {
        1 + 3 * self.inputs.len() + self.constraints.len()
    }
}

/// The block a loop is filling: everything needed to append a sample to its bytes.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Builder {
    pub first_ms: i64,
    pub layout: Vec<u8>,
    pub data: Vec<u8>,
    pub samples: i64,
    /// The last sample's time, state and phase.
    last: (i64, i64, i64),
}

impl Builder {
    /// An empty block keyed `first_ms`.
    pub fn new(first_ms: i64, layout: Vec<u8>) -> Builder {
        Builder {
            first_ms,
            layout,
            data: Vec::with_capacity(MAX_BLOCK_BYTES),
            samples: 0,
            last: (first_ms, 0, 0),
        }
    }

    /// A block read back from the database, to go on filling it.
    pub fn resume(first_ms: i64, layout: Vec<u8>, data: Vec<u8>) -> Result<Builder, HistoryError> {
        let mut b = Builder::new(first_ms, layout);
        for view in decode(first_ms, &Layout::decode(&b.layout)?, &data) {
            let view = view?;
            b.last = (view.at_ms, view.state, view.phase);
            b.samples += 1;
        }
        b.data = data;
        Ok(b)
    }

    /// Whether a sample at `at_ms` in `state` and `phase`, with `layout` and `values`
    /// values, belongs in this block: the same layout, not earlier than the last sample,
    /// within the block's span, and room left for it.
    pub fn takes(&self, at_ms: i64, state: i64, phase: i64, layout: &[u8], values: usize) -> bool {
        self.samples == 0
            || (self.layout == layout
                && at_ms >= self.last.0
                && at_ms - self.first_ms < MAX_BLOCK_SPAN_MS
                && self.data.len() + self.head(at_ms, state, phase).1 + 8 * values <= MAX_BLOCK_BYTES)
    }

    /// A sample's leading varint, whether its state and phase follow, and the bytes
    /// before its values.
    fn head(&self, at_ms: i64, state: i64, phase: i64) -> ((u64, bool), usize) {
        let changed = self.samples == 0 || (state, phase) != (self.last.1, self.last.2);
        let head = (zigzag(at_ms.wrapping_sub(self.last.0)) << 1) | u64::from(changed);
        let mut len = varint_len(head);
        if changed {
            len += varint_len(state as u64) + varint_len(phase as u64);
        }
        ((head, changed), len)
    }

    /// Appends a sample; `values` in layout order (objective, then applied, estimate and
    /// gradient per input, then each constraint).
    pub fn push(&mut self, at_ms: i64, state: i64, phase: i64, values: &[f64]) {
        let ((head, changed), _) = self.head(at_ms, state, phase);
        put_varint(&mut self.data, head);
        if changed {
            put_varint(&mut self.data, state as u64);
            put_varint(&mut self.data, phase as u64);
        }
        for v in values {
            let v = if v.is_finite() { *v } else { f64::NAN };
            self.data.extend_from_slice(&v.to_le_bytes());
        }
        self.last = (at_ms, state, phase);
        self.samples += 1;
    }

    /// The last sample's time.
    #[cfg(test)]
    pub fn last_ms(&self) -> i64 {
        self.last.0
    }
}

/// One decoded sample, its values still in the block's bytes.
#[derive(Debug, Clone, Copy)]
pub(super) struct View<'a> {
    pub at_ms: i64,
    pub state: i64,
    /// 0 for none.
    pub phase: i64,
    values: &'a [u8],
}

impl View<'_> {
    /// Value `k` in layout order (0 = objective, then 3 per input, then the constraints);
    /// `None` where it was not finite.
    pub fn value(&self, k: usize) -> Option<f64> {
        let bytes: [u8; 8] = self.values[8 * k..8 * k + 8].try_into().ok()?;
        Some(f64::from_le_bytes(bytes)).filter(|v| v.is_finite())
    }

    pub fn objective(&self) -> Option<f64> {
        self.value(0)
    }

    /// Input `i`'s (applied, estimate, gradient).
    pub fn input(&self, i: usize) -> [Option<f64>; 3] {
        [self.value(1 + 3 * i), self.value(2 + 3 * i), self.value(3 + 3 * i)]
    }
}

/// The samples of one block, in the order written.
pub(super) fn decode<'a>(
    first_ms: i64,
    layout: &Layout,
    data: &'a [u8],
) -> impl Iterator<Item = Result<View<'a>, HistoryError>> + 'a {
    let width = 8 * layout.width();
    let mut r = Reader { bytes: data, at: 0 };
    let (mut at_ms, mut state, mut phase) = (first_ms, 0, 0);
    std::iter::from_fn(move || {
        if r.at == r.bytes.len() {
            return None;
        }
        let mut next = || -> Result<View<'a>, HistoryError> {
            let head = r.varint()?;
            at_ms = at_ms.wrapping_add(unzigzag(head >> 1));
            if head & 1 == 1 {
                state = r.varint()? as i64;
                phase = r.varint()? as i64;
            }
            let values = r.take(width)?;
            Ok(View { at_ms, state, phase, values })
        };
        let view = next();
        if view.is_err() {
            // Nothing after a bad sample can be trusted.
            r.at = r.bytes.len();
        }
        Some(view)
    })
}

fn corrupt(what: &str) -> HistoryError {
    HistoryError::Corrupt(what.to_owned())
}

struct Reader<'a> {
    bytes: &'a [u8],
    at: usize,
}

impl<'a> Reader<'a> {
    fn varint(&mut self) -> Result<u64, HistoryError> {
        let mut value = 0u64;
        for shift in (0..64).step_by(7) {
            let byte = *self.bytes.get(self.at).ok_or_else(|| corrupt("a block ends inside a number"))?;
            self.at += 1;
            value |= u64::from(byte & 0x7f) << shift;
            if byte & 0x80 == 0 {
                return Ok(value);
            }
        }
        Err(corrupt("a block holds a number longer than 64 bits"))
    }

    fn take(&mut self, n: usize) -> Result<&'a [u8], HistoryError> {
        let end = self.at.checked_add(n).filter(|&e| e <= self.bytes.len());
        let end = end.ok_or_else(|| corrupt("a block ends inside a sample"))?;
        let bytes = &self.bytes[self.at..end];
        self.at = end;
        Ok(bytes)
    }
}

/// LEB128, as protocol buffers write it: 7 bits a byte, low bits first. Written out here
/// rather than taken from a crate: it is ten lines, and the reader above must bound it anyway.
fn put_varint(out: &mut Vec<u8>, mut v: u64) {
    while v >= 0x80 {
        out.push((v as u8) | 0x80);
        v >>= 7;
    }
    out.push(v as u8);
}

fn varint_len(v: u64) -> usize {
    (64 - v.max(1).leading_zeros() as usize).div_ceil(7)
}

fn zigzag(v: i64) -> u64 {
    ((v << 1) ^ (v >> 63)) as u64
}

fn unzigzag(v: u64) -> i64 {
    ((v >> 1) as i64) ^ -((v & 1) as i64)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn layout() -> Layout {
        Layout { inputs: vec![7, 300], constraints: vec![9] }
    }

    #[test]
    fn a_block_gives_back_every_time_id_and_value_it_was_given_with_non_finite_values_as_none() {
        let layout = layout();
        let rows: Vec<(i64, i64, i64, Vec<f64>)> = vec![
            (1_780_000_000_123, 3, 0, vec![1.5, 0.1, 0.2, -0.3, 1e300, -2.5e-300, 0.0, 42.0]),
            (
                1_780_000_000_223,
                3,
                11,
                vec![f64::NAN, f64::INFINITY, 7.0, 8.0, 9.0, 10.0, 11.0, f64::NEG_INFINITY],
            ),
            (1_780_000_000_223, 3, 11, vec![0.1 + 0.2, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]),
            (1_780_000_059_999, 200, 0, vec![-0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]),
        ];
        let mut b = Builder::new(rows[0].0, layout.encode());
        for (at, state, phase, values) in &rows {
            assert!(b.takes(*at, *state, *phase, &layout.encode(), values.len()));
            b.push(*at, *state, *phase, values);
        }
        let decoded: Vec<_> = decode(b.first_ms, &layout, &b.data).collect::<Result<_, _>>().unwrap();
        assert_eq!(decoded.len(), rows.len());
        for (view, (at, state, phase, values)) in decoded.iter().zip(&rows) {
            assert_eq!((view.at_ms, view.state, view.phase), (*at, *state, *phase));
            for (k, v) in values.iter().enumerate() {
                let expected = Some(*v).filter(|v| v.is_finite());
                assert_eq!(view.value(k).map(f64::to_bits), expected.map(f64::to_bits), "value {k}");
            }
        }
        assert_eq!(decoded[0].input(1), [Some(1e300), Some(-2.5e-300), Some(0.0)]);
        assert_eq!(Layout::decode(&layout.encode()).unwrap(), layout);
        let resumed = Builder::resume(b.first_ms, b.layout.clone(), b.data.clone()).unwrap();
        assert_eq!(resumed, b);
    }

    #[test]
    fn a_block_keyed_after_its_first_sample_decodes_to_the_samples_own_time() {
        let mut b = Builder::new(1000, Layout::default().encode());
        b.push(999, 1, 0, &[2.0]);
        let view = decode(1000, &Layout::default(), &b.data).next().unwrap().unwrap();
        assert_eq!(view.at_ms, 999);
    }

    #[test]
    fn a_one_input_sample_at_ten_hertz_in_an_unchanged_state_takes_thirty_four_bytes() {
        let layout = Layout { inputs: vec![1], constraints: vec![] };
        let mut b = Builder::new(0, layout.encode());
        b.push(0, 3, 0, &[1.0; 4]);
        let first = b.data.len();
        b.push(100, 3, 0, &[1.0; 4]);
        assert_eq!(b.data.len() - first, 2 + 32);
    }

    #[test]
    fn a_block_refuses_another_layout_an_earlier_time_a_minute_later_or_a_sample_past_its_size() {
        let layout = layout().encode();
        let mut b = Builder::new(0, layout.clone());
        b.push(0, 1, 0, &[1.0; 8]);
        assert!(b.takes(10, 1, 0, &layout, 8));
        assert!(!b.takes(10, 1, 0, &Layout::default().encode(), 1));
        assert!(!b.takes(-1, 1, 0, &layout, 8));
        assert!(!b.takes(MAX_BLOCK_SPAN_MS, 1, 0, &layout, 8));
        while b.takes(b.last_ms() + 1, 1, 0, &layout, 8) {
            b.push(b.last_ms() + 1, 1, 0, &[1.0; 8]);
        }
        assert!(b.data.len() <= MAX_BLOCK_BYTES);
        assert!(b.data.len() + 66 > MAX_BLOCK_BYTES, "the block is full: {} bytes", b.data.len());
        let mut lengths = Builder::new(0, layout.clone());
        for (at, state) in [(0, 1), (1, 1), (200, 1), (300, 300), (1_000_000, 300)] {
            let before = lengths.data.len();
            let expected = lengths.head(at, state, 0).1;
            lengths.push(at, state, 0, &[1.0; 8]);
            assert_eq!(lengths.data.len() - before, expected + 64, "at {at}");
        }
    }

    #[test]
    fn truncated_or_overlong_bytes_are_errors_never_panics() {
        let layout = layout();
        let mut b = Builder::new(0, layout.encode());
        b.push(5, 1, 0, &[1.0; 8]);
        for cut in 0..b.data.len() {
            let results: Vec<_> = decode(0, &layout, &b.data[..cut]).collect();
            assert!(cut == 0 || results.last().is_some_and(Result::is_err), "cut at {cut}");
        }
        assert!(decode(0, &layout, &[0xff; 12]).next().unwrap().is_err());
        assert!(Layout::decode(&[0x02, 0x01]).is_err());
        assert!(Layout::decode(&[0x00, 0x00, 0x05]).is_err());
        assert!(Layout::decode(&[0xff, 0xff, 0xff, 0x0f]).is_err());
    }
}
