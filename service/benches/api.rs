//! API latency under load: `GET /api/v1/loops` with N live loops, at a fixed request rate
//! from a load generator on loopback, timed from each request's scheduled start (so a slow
//! answer cannot hide the requests queued behind it).
//!
//! Run with `cargo bench -p ridgeline --bench api` (`-- LOOPS RPS SECONDS` to change the
//! defaults of 100 loops, 1000 requests per second, 20 s).

use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use ridgeline::app::{App, Options};
use tokio_util::sync::CancellationToken;

mod scale;
use scale::{Layout, percentile, start_plcs};

fn main() -> anyhow::Result<()> {
    let numbers: Vec<u64> = std::env::args().skip(1).filter_map(|a| a.parse().ok()).collect();
    let loops = numbers.first().copied().unwrap_or(100) as usize;
    let rps = numbers.get(1).copied().unwrap_or(1000);
    let seconds = numbers.get(2).copied().unwrap_or(20);
    let layout = Layout::default();
    let plcs = loops.div_ceil(layout.loops_per_plc);

    let stop = CancellationToken::new();
    let (_sims, ports) = start_plcs(&layout, plcs, &stop)?;

    let service = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .thread_name("service")
        .enable_all()
        .build()?;
    let dir = tempfile::tempdir()?;
    let mut config = ridgeline::config::parse(&layout.config_text(&ports), "bench-config")
        .map_err(|p| anyhow::anyhow!("{p}"))?;
    config.loops.truncate(loops);
    let options = Options {
        database: Some(dir.path().join("history.db")),
        listen: Some("127.0.0.1:0".parse()?),
        ..Options::default()
    };
    let app = service.block_on(App::build(&config, &options))?;
    let addr = app.local_addr()?;
    let stopped = stop.clone();
    let running = service.spawn(async move { app.run_until(stopped.cancelled_owned()).await });

    let load = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .thread_name("load")
        .enable_all()
        .build()?;
    let url = format!("http://{addr}/api/v1/loops");
    let latencies = Arc::new(Mutex::new(Vec::new()));
    let failures = Arc::new(Mutex::new(0u64));
    load.block_on(async {
        let client = reqwest::Client::builder().pool_max_idle_per_host(64).build()?;
        // Let every loop connect and tick, and the connection pool warm up.
        let ready = format!("http://{addr}/readyz");
        let deadline = Instant::now() + Duration::from_secs(20);
        while client.get(&ready).send().await.map(|r| r.status().as_u16()).unwrap_or(0) != 200 {
            anyhow::ensure!(Instant::now() < deadline, "the service did not become ready");
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        tokio::time::sleep(Duration::from_secs(1)).await;
        let total = rps * seconds;
        let start = tokio::time::Instant::now();
        let mut requests = Vec::with_capacity(total as usize);
        for i in 0..total {
            let scheduled = start + Duration::from_secs_f64(i as f64 / rps as f64);
            tokio::time::sleep_until(scheduled).await;
            let (client, url, latencies, failures) = (client.clone(), url.clone(), latencies.clone(), failures.clone());
            requests.push(tokio::spawn(async move {
                let ok = match client.get(&url).send().await {
                    Ok(r) if r.status().is_success() => r.bytes().await.is_ok(),
                    _ => false,
                };
                latencies.lock().unwrap().push(scheduled.elapsed());
                if !ok {
                    *failures.lock().unwrap() += 1;
                }
            }));
        }
        for r in requests {
            let _ = r.await;
        }
        let elapsed = start.elapsed().as_secs_f64();
        let mut sorted = latencies.lock().unwrap().clone();
        sorted.sort();
        println!("GET /api/v1/loops with {loops} live loops, {rps} requests/s for {seconds} s from a client on loopback");
        println!("  requests              {} in {elapsed:.1} s, {} failed", sorted.len(), failures.lock().unwrap());
        println!(
            "  latency               p50 {:?}  p99 {:?}  p99.9 {:?}  max {:?}",
            percentile(&sorted, 0.5),
            percentile(&sorted, 0.99),
            percentile(&sorted, 0.999),
            sorted.last().copied().unwrap_or_default()
        );
        anyhow::Ok(())
    })?;
    stop.cancel();
    service.block_on(running)??;
    Ok(())
}
