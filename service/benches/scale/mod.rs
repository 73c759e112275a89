//! The scenario the live and API benchmarks share: simulated PLCs serving ten bowls
//! each, and one loop per bowl at 10 Hz.

pub const LOOPS_PER_PLC: usize = 10;
pub const TICK_S: f64 = 0.1;

pub fn plant_text() -> String {
    let mut text = String::from("step_s = 0.01\n");
    for k in 0..LOOPS_PER_PLC {
        text += &format!("[[inputs]]\nname = \"u{k}\"\ninitial = 2.0\nholding_register = {}\n", 2 * k);
        text += &format!(
            "[[outputs]]\nname = \"y{k}\"\ninput_register = {}\nexpression = \"10 - 2 * (u{k} - 3)^2\"\nnoise_std = 0.001\n",
            100 + 2 * k
        );
    }
    text
}

pub fn config_text(ports: &[u16]) -> String {
    let mut text = String::from("[service]\nlisten = \"127.0.0.1:0\"\n");
    for (p, port) in ports.iter().enumerate() {
        text += &format!("[links.plc{p}]\nmodbus_tcp = \"127.0.0.1:{port}\"\ntimeout_ms = 500\n");
        for k in 0..LOOPS_PER_PLC {
            text += &format!(
                "[tags.y{p}_{k}]\nlink = \"plc{p}\"\ninput_register = {}\ntype = \"f32\"\n",
                100 + 2 * k
            );
        }
    }
    for (p, _) in ports.iter().enumerate() {
        for k in 0..LOOPS_PER_PLC {
            text += &format!(
                "[[loops]]\nname = \"loop-{p}-{k}\"\nobjective = \"y{p}_{k}\"\ndirection = \"maximize\"\ntick_s = {TICK_S}\n\
                 start_mode = \"seeking\"\n[loops.filter]\nhighpass_hz = 0.1\n[loops.watchdog]\nstale_after_s = 1\n\
                 [[loops.inputs]]\nname = \"u\"\nwrite = {{ link = \"plc{p}\", holding_register = {}, type = \"f32\" }}\n\
                 limits = [0.0, 6.0]\nbounds = [0.0, 6.0]\nsafe = 2.0\nmax_rate_per_s = 1.0\ndither_amplitude = 0.1\n\
                 dither_period_s = 2.0\ngain = 0.01\n",
                2 * k
            );
        }
    }
    text
}

/// The middle value of sorted durations at fraction `p` (0.5 for the median).
pub fn percentile(sorted: &[std::time::Duration], p: f64) -> std::time::Duration {
    if sorted.is_empty() {
        return std::time::Duration::ZERO;
    }
    sorted[((sorted.len() - 1) as f64 * p).round() as usize]
}

/// Starts `plcs` simulated PLCs on a runtime of their own (threads named `plant-sim`, so
/// their CPU can be told apart); returns the runtime and their ports. They stop with `stop`.
pub fn start_plcs(
    plcs: usize,
    stop: &tokio_util::sync::CancellationToken,
) -> anyhow::Result<(tokio::runtime::Runtime, Vec<u16>)> {
    let sims = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .thread_name("plant-sim")
        .enable_all()
        .build()?;
    let spec = ridgeline::sim::parse(&plant_text(), "bench-plant")?;
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
