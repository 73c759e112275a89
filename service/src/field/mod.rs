//! Links to the plant: Modbus/TCP and HTTP, the register codec, and per-loop plans of
//! what to read and write. I/O happens here and nowhere else; no math beyond decoding.

pub mod codec;
mod error;
pub mod http;
pub mod modbus;

use std::collections::HashMap;
use std::time::Duration;

use crate::config::{Codec, Config, LinkKind, Range, RegisterSpace, TagSource};
use crate::report::Reporting;
pub use error::{Function, LinkError};
use http::HttpLink;
use modbus::ModbusLink;
pub use modbus::Urgency;

/// The protocol's limit on registers per read request (Modbus Application Protocol
/// Specification V1.1b3, §6.3 and §6.4).
pub const MAX_READ_REGISTERS: u16 = 125;

/// Every configured link, by name. Cheap to clone; clones share connections.
#[derive(Debug, Clone, Default)]
pub struct Links {
    modbus: HashMap<String, ModbusLink>,
    http: HashMap<String, HttpLink>,
}

impl Links {
    /// Handles on every link of a validated config; nothing connects yet.
    pub fn new(config: &Config, reporting: &Reporting) -> Result<Self, LinkError> {
        let mut links = Links::default();
        let caps = backoff_caps(config);
        for link in &config.links {
            let timeout = Duration::from_millis(link.timeout_ms);
            match &link.kind {
                LinkKind::ModbusTcp { address, unit } => {
                    let cap = caps.get(link.name.as_str()).copied().unwrap_or(modbus::BACKOFF_CAP);
                    let m =
                        ModbusLink::reporting_to(&link.name, address, *unit, timeout, cap, reporting.clone());
                    links.modbus.insert(link.name.clone(), m);
                }
                LinkKind::HttpGet { url, ca_file } => {
                    let trusted = ca_file.as_deref();
                    links.http.insert(
                        link.name.clone(),
                        HttpLink::new(&link.name, url, trusted, timeout, reporting.clone())?,
                    );
                }
            }
        }
        Ok(links)
    }
}

/// A link's reconnection backoff is capped at half the shortest tick of the loops that
/// use it, so a loop retries its link (and its fallback write) on every tick, not every
/// other one when a tick comes a little before the backoff ends. Links no loop uses are
/// absent. One pass over the loops, so thousands of links start as fast as a few.
fn backoff_caps(config: &Config) -> HashMap<&str, Duration> {
    let tag_links: HashMap<&str, &str> =
        config.tags.iter().map(|t| (t.name.as_str(), t.link.as_str())).collect();
    let mut fastest: HashMap<&str, f64> = HashMap::new();
    for l in &config.loops {
        let reads =
            l.objective.names().iter().chain(&l.permit).filter_map(|t| tag_links.get(t.as_str()).copied());
        let writes = l.inputs.iter().map(|i| i.write.link.as_str());
        for link in reads.chain(writes).chain(l.heartbeat.as_ref().map(|h| h.link.as_str())) {
            let tick = fastest.entry(link).or_insert(f64::INFINITY);
            *tick = tick.min(l.tick_s);
        }
    }
    fastest.into_iter().map(|(link, tick)| (link, Duration::from_secs_f64(tick / 2.0))).collect()
}

/// One value to read from registers, and where its value goes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RegisterRead {
    pub slot: usize,
    pub space: RegisterSpace,
    pub address: u16,
    pub codec: Codec,
}

/// One read request covering one or more values.
#[derive(Debug, Clone, PartialEq)]
pub struct Block {
    pub space: RegisterSpace,
    pub start: u16,
    pub count: u16,
    pub members: Vec<RegisterRead>,
}

/// Groups values into as few read requests as the register layout allows: values in the
/// same table that touch or overlap share a request, up to 125 registers. Registers
/// between separate values are never read, since a PLC may refuse unmapped addresses.
pub fn plan_blocks(mut reads: Vec<RegisterRead>) -> Vec<Block> {
    reads.sort_by_key(|r| (r.space == RegisterSpace::Holding, r.address));
    let mut blocks: Vec<Block> = Vec::new();
    for read in reads {
        let end = u32::from(read.address) + u32::from(read.codec.kind.width());
        if let Some(b) = blocks.last_mut()
            && b.space == read.space
            && read.address <= b.start.saturating_add(b.count)
            && end - u32::from(b.start) <= u32::from(MAX_READ_REGISTERS)
        {
            b.count = b.count.max((end - u32::from(b.start)) as u16);
            b.members.push(read);
            continue;
        }
        blocks.push(Block {
            space: read.space,
            start: read.address,
            count: read.codec.kind.width(),
            members: vec![read],
        });
    }
    blocks
}

/// One value to read from a JSON document.
#[derive(Debug, Clone)]
struct PointerRead {
    slot: usize,
    tag: String,
    pointer: String,
}

#[derive(Debug, Clone)]
enum ReadGroup {
    Modbus { link: ModbusLink, blocks: Vec<Block> },
    Http { link: HttpLink, tags: Vec<PointerRead> },
}

/// Where one input's setpoint is written.
#[derive(Debug, Clone)]
struct WriteTarget {
    link: ModbusLink,
    register: u16,
    codec: Codec,
}

/// What one loop reads and writes, planned once at start.
#[derive(Debug, Clone)]
pub struct LoopIo {
    groups: Vec<ReadGroup>,
    writes: Vec<WriteTarget>,
    heartbeat: Option<(ModbusLink, u16)>,
}

impl LoopIo {
    /// Plans reads of `tags` (their values land in that order) and writes of the loop's
    /// inputs. The config must be validated, so every name resolves.
    pub fn new(config: &Config, links: &Links, loop_index: usize, tags: &[String]) -> Self {
        let mut by_link: Vec<(String, Vec<RegisterRead>, Vec<PointerRead>)> = Vec::new();
        for (slot, name) in tags.iter().enumerate() {
            let Some(tag) = config.tag(name) else { continue };
            let i = by_link.iter().position(|(l, ..)| *l == tag.link).unwrap_or_else(|| {
                by_link.push((tag.link.clone(), Vec::new(), Vec::new()));
                by_link.len() - 1
            });
            let entry = &mut by_link[i];
            match &tag.source {
                TagSource::Register { space, address, codec } => {
                    entry.1.push(RegisterRead { slot, space: *space, address: *address, codec: *codec })
                }
                TagSource::JsonPointer(pointer) => {
                    entry.2.push(PointerRead { slot, tag: name.clone(), pointer: pointer.clone() })
                }
            }
        }
        let groups = by_link
            .into_iter()
            .filter_map(|(link, registers, pointers)| {
                if let Some(m) = links.modbus.get(&link) {
                    Some(ReadGroup::Modbus { link: m.clone(), blocks: plan_blocks(registers) })
                } else {
                    links.http.get(&link).map(|h| ReadGroup::Http { link: h.clone(), tags: pointers })
                }
            })
            .collect();
        let writes = config.loops[loop_index]
            .inputs
            .iter()
            .filter_map(|input| {
                links.modbus.get(&input.write.link).map(|link| WriteTarget {
                    link: link.clone(),
                    register: input.write.holding_register,
                    codec: input.write.codec,
                })
            })
            .collect();
        let heartbeat = config.loops[loop_index]
            .heartbeat
            .as_ref()
            .and_then(|h| links.modbus.get(&h.link).map(|link| (link.clone(), h.holding_register)));
        LoopIo { groups, writes, heartbeat }
    }

    /// Reads every tag into `values` (in the order given to `new`): `None` where its read
    /// failed. Every link is tried, so a tag on a healthy link is read even when another
    /// link is down; the first error is returned.
    pub async fn read(&self, values: &mut [Option<f64>]) -> Result<(), LinkError> {
        let mut first_error = None;
        let mut failed = |e: LinkError| {
            first_error.get_or_insert(e);
        };
        for group in &self.groups {
            match group {
                ReadGroup::Modbus { link, blocks } => {
                    for block in blocks {
                        let words = link.read(block.space, block.start, block.count).await;
                        for m in &block.members {
                            let at = usize::from(m.address - block.start);
                            let width = usize::from(m.codec.kind.width());
                            values[m.slot] = match &words {
                                Ok(words) => Some(
                                    words
                                        .get(at..at + width)
                                        .map_or(f64::NAN, |w| codec::decode(&m.codec, w)),
                                ),
                                Err(_) => None,
                            };
                        }
                        if let Err(e) = words {
                            failed(e);
                        }
                    }
                }
                ReadGroup::Http { link, tags } => {
                    let document = link.fetch().await;
                    for t in tags {
                        let value = match &document {
                            Ok(document) => link.number(document, &t.tag, &t.pointer),
                            Err(e) => Err(e.clone()),
                        };
                        values[t.slot] = value.map_err(&mut failed).ok();
                    }
                }
            }
        }
        first_error.map_or(Ok(()), Err)
    }

    /// Writes input `input`'s setpoint, refusing values its register type cannot hold and
    /// keeping the value the register ends up with inside `bounds`.
    pub async fn write(
        &self,
        input: usize,
        value: f64,
        bounds: Range,
        urgency: Urgency,
    ) -> Result<(), LinkError> {
        let Some(target) = self.writes.get(input) else { return Ok(()) };
        let words = codec::encode_within(&target.codec, value, bounds.min, bounds.max).map_err(|source| {
            LinkError::Encode { link: target.link.name().to_owned(), address: target.register, source }
        })?;
        target.link.write(target.register, &words, urgency).await
    }

    /// Writes the heartbeat counter, when the loop has one (function 0x06).
    pub async fn write_heartbeat(&self, counter: u16) -> Result<(), LinkError> {
        match &self.heartbeat {
            Some((link, register)) => link.write(*register, &[counter], Urgency::Normal).await,
            None => Ok(()),
        }
    }

    /// Reads the heartbeat register, when the loop has one.
    pub async fn read_heartbeat(&self) -> Option<Result<u16, LinkError>> {
        let (link, register) = self.heartbeat.as_ref()?;
        Some(link.read(RegisterSpace::Holding, *register, 1).await.map(|w| w.first().copied().unwrap_or(0)))
    }

    /// Reads back the setpoint currently in input `input`'s register.
    pub async fn read_back(&self, input: usize) -> Result<f64, LinkError> {
        let Some(target) = self.writes.get(input) else { return Ok(f64::NAN) };
        let words =
            target.link.read(RegisterSpace::Holding, target.register, target.codec.kind.width()).await?;
        Ok(codec::decode(&target.codec, &words))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{RegisterType, WordOrder};

    fn read(slot: usize, space: RegisterSpace, address: u16, kind: RegisterType) -> RegisterRead {
        RegisterRead {
            slot,
            space,
            address,
            codec: Codec { kind, word_order: WordOrder::Big, scale: 1.0, offset: 0.0 },
        }
    }

    #[test]
    fn touching_values_share_one_request_and_gaps_split_them() {
        let blocks = plan_blocks(vec![
            read(0, RegisterSpace::Input, 102, RegisterType::F32),
            read(1, RegisterSpace::Input, 100, RegisterType::F32),
            read(2, RegisterSpace::Input, 110, RegisterType::U16),
            read(3, RegisterSpace::Holding, 104, RegisterType::U16),
        ]);
        let shape: Vec<_> = blocks.iter().map(|b| (b.space, b.start, b.count, b.members.len())).collect();
        assert_eq!(
            shape,
            vec![
                (RegisterSpace::Input, 100, 4, 2),
                (RegisterSpace::Input, 110, 1, 1),
                (RegisterSpace::Holding, 104, 1, 1)
            ]
        );
    }

    #[test]
    fn no_request_exceeds_125_registers() {
        // Source: Modbus Application Protocol Specification V1.1b3 §6.3/6.4, at most 125 registers per read.
        let reads =
            (0..200).map(|i| read(i, RegisterSpace::Input, 2 * i as u16, RegisterType::F32)).collect();
        let blocks = plan_blocks(reads);
        assert!(blocks.iter().all(|b| b.count <= MAX_READ_REGISTERS));
        assert_eq!(blocks.iter().map(|b| b.members.len()).sum::<usize>(), 200);
        assert_eq!(blocks.len(), 4, "400 registers in blocks of at most 124 whole f32s");
    }

    #[test]
    fn the_same_register_read_twice_is_one_request() {
        let blocks = plan_blocks(vec![
            read(0, RegisterSpace::Input, 7, RegisterType::U16),
            read(1, RegisterSpace::Input, 7, RegisterType::U16),
        ]);
        assert_eq!(blocks.len(), 1);
        assert_eq!(blocks[0].count, 1);
    }
}
