//! The scenario the live and API benchmarks share: simulated PLCs serving a few bowls
//! each over Modbus/TCP, one link per PLC, and one loop per bowl.

/// Loops sharing one simulated PLC (and its one connection) unless asked otherwise.
const LOOPS_PER_PLC: usize = 10;
/// Ticks per second of every loop unless asked otherwise.
const HZ: f64 = 10.0;
/// Each PLC's bowls take holding registers 0, 2, 4, ... below its first output at 100.
pub const MAX_LOOPS_PER_PLC: usize = 50;

/// How the loops are laid out: how many share a PLC, and how often they tick.
#[derive(Debug, Clone, Copy)]
pub struct Layout {
    pub loops_per_plc: usize,
    pub hz: f64,
}

impl Default for Layout {
    fn default() -> Self {
        Layout { loops_per_plc: LOOPS_PER_PLC, hz: HZ }
    }
}

impl Layout {
    /// One PLC's plant: a bowl per loop, stepped twice per loop tick (a bowl has no
    /// dynamics; a step only draws new noise, and a PLC's stepping is its main cost).
    pub fn plant_text(&self) -> String {
        let mut text = format!("step_s = {:?}\n", 1.0 / (2.0 * self.hz));
        for k in 0..self.loops_per_plc {
            text += &format!("[[inputs]]\nname = \"u{k}\"\ninitial = 2.0\nholding_register = {}\n", 2 * k);
            text += &format!(
                "[[outputs]]\nname = \"y{k}\"\ninput_register = {}\nexpression = \"10 - 2 * (u{k} - 3)^2\"\nnoise_std = 0.001\n",
                100 + 2 * k
            );
        }
        text
    }

    /// The service config: a link per PLC port and a loop per bowl. Filter, dither, rate
    /// and watchdog scale with the tick, so every layout asks the same of a loop per tick.
    pub fn config_text(&self, ports: &[u16]) -> String {
        let hz = self.hz;
        let mut text = String::from("[service]\nlisten = \"127.0.0.1:0\"\n");
        for (p, port) in ports.iter().enumerate() {
            text += &format!("[links.plc{p}]\nmodbus_tcp = \"127.0.0.1:{port}\"\ntimeout_ms = 500\n");
            for k in 0..self.loops_per_plc {
                text += &format!(
                    "[tags.y{p}_{k}]\nlink = \"plc{p}\"\ninput_register = {}\ntype = \"f32\"\n",
                    100 + 2 * k
                );
            }
        }
        for (p, _) in ports.iter().enumerate() {
            for k in 0..self.loops_per_plc {
                text += &format!(
                    "[[loops]]\nname = \"loop-{p}-{k}\"\nobjective = \"y{p}_{k}\"\ndirection = \"maximize\"\ntick_s = {:?}\n\
                     start_mode = \"seeking\"\n[loops.filter]\nhighpass_hz = {:?}\n[loops.watchdog]\nstale_after_s = {:?}\n\
                     [[loops.inputs]]\nname = \"u\"\nwrite = {{ link = \"plc{p}\", holding_register = {}, type = \"f32\" }}\n\
                     limits = [0.0, 6.0]\nbounds = [0.0, 6.0]\nsafe = 2.0\nmax_rate_per_s = {:?}\ndither_amplitude = 0.1\n\
                     dither_period_s = {:?}\ngain = 0.01\n",
                    1.0 / hz,
                    hz / 100.0,
                    10.0 / hz,
                    2 * k,
                    hz / 10.0,
                    20.0 / hz,
                );
            }
        }
        text
    }
}

/// The middle value of sorted durations at fraction `p` (0.5 for the median).
pub fn percentile(sorted: &[std::time::Duration], p: f64) -> std::time::Duration {
    if sorted.is_empty() {
        return std::time::Duration::ZERO;
    }
    sorted[((sorted.len() - 1) as f64 * p).round() as usize]
}

/// Starts `plcs` simulated PLCs, each on a port of its own, on a runtime of their own
/// (threads named `plant-sim`, so their CPU can be told apart); returns the runtime and
/// their ports. They stop with `stop`.
pub fn start_plcs(
    layout: &Layout,
    plcs: usize,
    stop: &tokio_util::sync::CancellationToken,
) -> anyhow::Result<(tokio::runtime::Runtime, Vec<u16>)> {
    anyhow::ensure!(
        (1..=MAX_LOOPS_PER_PLC).contains(&layout.loops_per_plc),
        "loops per PLC must be 1 to {MAX_LOOPS_PER_PLC}, not {}",
        layout.loops_per_plc
    );
    let sims = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .thread_name("plant-sim")
        .enable_all()
        .build()?;
    let spec = ridgeline::sim::parse(&layout.plant_text(), "bench-plant")?;
    let mut ports = Vec::new();
    for _ in 0..plcs {
        let server =
            sims.block_on(ridgeline::sim::server::PlantServer::bind(&spec, "127.0.0.1:0".parse()?, 1.0))?;
        ports.push(server.local_addr()?.port());
        let stop = stop.clone();
        sims.spawn(async move { server.run_until(stop.cancelled_owned()).await });
    }
    Ok((sims, ports))
}
