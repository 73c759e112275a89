//! Serving a plant model over Modbus/TCP, stepped by the wall clock (optionally faster):
//! outputs as f32 (big word order) at their input registers, inputs writable and
//! readable back at their holding registers. Any other address answers exception 0x02.

use std::collections::HashMap;
use std::future::{self, Future};
use std::net::SocketAddr;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use tokio::net::TcpListener;
use tokio::time::{Instant, MissedTickBehavior};
use tokio_modbus::server::tcp::{Server, accept_tcp_connection};
use tokio_modbus::{ExceptionCode, Request, Response};
use tokio_util::sync::CancellationToken;

use super::{Plant, PlantSpec};

/// The plant and its holding registers, shared by the stepping task and every client.
struct Shared {
    plant: Plant,
    /// Words of every input's f32, by register; written words stay as written.
    holding: HashMap<u16, u16>,
    /// Which input each holding register belongs to.
    holding_owner: HashMap<u16, usize>,
    /// Which output (and which word of it) each input register holds.
    input_owner: HashMap<u16, (usize, usize)>,
}

/// A cheap handle on a served plant, for reading its state (the demo's scoring).
#[derive(Clone)]
pub struct PlantHandle {
    shared: Arc<Mutex<Shared>>,
}

impl PlantHandle {
    fn lock(&self) -> MutexGuard<'_, Shared> {
        // A panic while holding the lock cannot leave the plant half-stepped in a way
        // that matters more than stopping the demo would.
        self.shared.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
    }

    /// Plant time and the current input values.
    pub fn snapshot(&self) -> (f64, Vec<f64>) {
        let shared = self.lock();
        (shared.plant.time_s(), shared.plant.inputs().to_vec())
    }
}

/// A plant model bound to a TCP port, not yet serving.
pub struct PlantServer {
    listener: TcpListener,
    handle: PlantHandle,
    step_s: f64,
    speed: f64,
}

impl PlantServer {
    /// Binds `addr`; `speed` runs plant time that many times faster than wall time.
    pub async fn bind(spec: &PlantSpec, addr: SocketAddr, speed: f64) -> std::io::Result<Self> {
        let listener = TcpListener::bind(addr).await?;
        let plant = Plant::new(spec);
        let mut holding = HashMap::new();
        let mut holding_owner = HashMap::new();
        for (i, input) in spec.inputs.iter().enumerate() {
            let [high, low] = f32_words(plant.inputs()[i]);
            holding.insert(input.holding_register, high);
            holding.insert(input.holding_register + 1, low);
            holding_owner.insert(input.holding_register, i);
            holding_owner.insert(input.holding_register + 1, i);
        }
        let mut input_owner = HashMap::new();
        for (k, output) in spec.outputs.iter().enumerate() {
            input_owner.insert(output.input_register, (k, 0));
            input_owner.insert(output.input_register + 1, (k, 1));
        }
        let shared = Shared { plant, holding, holding_owner, input_owner };
        Ok(PlantServer {
            listener,
            handle: PlantHandle { shared: Arc::new(Mutex::new(shared)) },
            step_s: spec.step_s,
            speed,
        })
    }

    pub fn local_addr(&self) -> std::io::Result<SocketAddr> {
        self.listener.local_addr()
    }

    pub fn handle(&self) -> PlantHandle {
        self.handle.clone()
    }

    /// Serves and steps the plant until `shutdown` completes.
    pub async fn run_until(self, shutdown: impl Future<Output = ()>) -> std::io::Result<()> {
        let cancel = CancellationToken::new();
        let stepping =
            tokio::spawn(step_by_clock(self.handle.clone(), self.step_s, self.speed, cancel.clone()));
        let server = Server::new(self.listener);
        let handle = self.handle.clone();
        let new_service = move |_peer| Ok(Some(ModbusService { plant: handle.clone() }));
        let on_connected = |stream, peer| {
            let new_service = new_service.clone();
            async move { accept_tcp_connection(stream, peer, new_service) }
        };
        let on_process_error = |e| tracing::debug!(error = %e, "simulator connection ended with an error");
        let served = tokio::select! {
            r = server.serve(&on_connected, on_process_error) => r,
            () = shutdown => Ok(()),
        };
        cancel.cancel();
        let _ = stepping.await;
        served
    }
}

/// Steps the plant so that plant time follows wall time times `speed`.
async fn step_by_clock(plant: PlantHandle, step_s: f64, speed: f64, cancel: CancellationToken) {
    let start = Instant::now();
    let period = Duration::from_secs_f64((step_s / speed).max(0.001));
    let mut interval = tokio::time::interval(period);
    interval.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tokio::select! {
            () = cancel.cancelled() => return,
            _ = interval.tick() => {
                let target = start.elapsed().as_secs_f64() * speed;
                let mut shared = plant.lock();
                shared.plant.advance_to(target);
            }
        }
    }
}

/// One client connection's view of the plant.
struct ModbusService {
    plant: PlantHandle,
}

impl tokio_modbus::server::Service for ModbusService {
    type Request = Request<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, request: Request<'static>) -> Self::Future {
        let mut shared = self.plant.lock();
        future::ready(answer(&mut shared, request))
    }
}

fn answer(shared: &mut Shared, request: Request<'_>) -> Result<Response, ExceptionCode> {
    match request {
        Request::ReadInputRegisters(start, count) => {
            let words = registers(start, count)?
                .map(|r| {
                    let &(k, word) = shared.input_owner.get(&r).ok_or(ExceptionCode::IllegalDataAddress)?;
                    Ok(f32_words(shared.plant.output(k))[word])
                })
                .collect::<Result<_, _>>()?;
            Ok(Response::ReadInputRegisters(words))
        }
        Request::ReadHoldingRegisters(start, count) => {
            let words = registers(start, count)?
                .map(|r| shared.holding.get(&r).copied().ok_or(ExceptionCode::IllegalDataAddress))
                .collect::<Result<_, _>>()?;
            Ok(Response::ReadHoldingRegisters(words))
        }
        Request::WriteSingleRegister(address, word) => {
            write(shared, address, &[word])?;
            Ok(Response::WriteSingleRegister(address, word))
        }
        Request::WriteMultipleRegisters(start, words) => {
            write(shared, start, &words)?;
            Ok(Response::WriteMultipleRegisters(start, words.len() as u16))
        }
        _ => Err(ExceptionCode::IllegalFunction),
    }
}

/// The addresses of a read, refusing counts outside 1..=125 (spec §6.3/6.4).
fn registers(start: u16, count: u16) -> Result<impl Iterator<Item = u16>, ExceptionCode> {
    if !(1..=125).contains(&count) {
        return Err(ExceptionCode::IllegalDataValue);
    }
    let end = u32::from(start) + u32::from(count);
    if end > 65536 {
        return Err(ExceptionCode::IllegalDataAddress);
    }
    Ok((u32::from(start)..end).map(|r| r as u16))
}

fn write(shared: &mut Shared, start: u16, words: &[u16]) -> Result<(), ExceptionCode> {
    let addresses: Vec<u16> = registers(start, words.len().max(1) as u16)?.collect();
    if addresses.iter().any(|r| !shared.holding_owner.contains_key(r)) {
        return Err(ExceptionCode::IllegalDataAddress);
    }
    for (r, w) in addresses.iter().zip(words) {
        shared.holding.insert(*r, *w);
    }
    let mut touched: Vec<usize> =
        addresses.iter().filter_map(|r| shared.holding_owner.get(r).copied()).collect();
    touched.dedup();
    for i in touched {
        let register = shared.plant.spec().inputs[i].holding_register;
        let high = shared.holding.get(&register).copied().unwrap_or(0);
        let low = shared.holding.get(&(register + 1)).copied().unwrap_or(0);
        let value = f64::from(f32::from_bits((u32::from(high) << 16) | u32::from(low)));
        if value.is_finite() {
            shared.plant.set_input(i, value);
        }
    }
    Ok(())
}

fn f32_words(value: f64) -> [u16; 2] {
    let bits = (value as f32).to_bits();
    [(bits >> 16) as u16, bits as u16]
}

#[cfg(test)]
mod tests {
    use super::*;

    fn shared() -> Shared {
        let text = "step_s = 1\n[[inputs]]\nname = \"u\"\ninitial = 1.5\nholding_register = 10\n\
                    [[outputs]]\nname = \"y\"\ninput_register = 0\nexpression = \"2 * u\"\n";
        let spec = crate::sim::parse(text, "t").expect("valid");
        let plant = Plant::new(&spec);
        let mut holding = HashMap::new();
        let [h, l] = f32_words(1.5);
        holding.insert(10, h);
        holding.insert(11, l);
        Shared {
            plant,
            holding,
            holding_owner: HashMap::from([(10, 0), (11, 0)]),
            input_owner: HashMap::from([(0, (0, 0)), (1, (0, 1))]),
        }
    }

    #[test]
    fn outputs_are_served_as_big_endian_f32() {
        let mut s = shared();
        let Ok(Response::ReadInputRegisters(words)) = answer(&mut s, Request::ReadInputRegisters(0, 2))
        else {
            panic!("read failed")
        };
        assert_eq!(words, f32_words(3.0).to_vec());
    }

    #[test]
    fn a_written_input_drives_the_plant_and_reads_back() {
        let mut s = shared();
        let words = f32_words(2.25);
        answer(&mut s, Request::WriteMultipleRegisters(10, words.to_vec().into())).expect("write");
        assert_eq!(s.plant.inputs()[0], 2.25);
        let Ok(Response::ReadHoldingRegisters(back)) = answer(&mut s, Request::ReadHoldingRegisters(10, 2))
        else {
            panic!("read back failed")
        };
        assert_eq!(back, words.to_vec());
    }

    #[test]
    fn unmapped_addresses_answer_illegal_data_address() {
        let mut s = shared();
        assert_eq!(
            answer(&mut s, Request::ReadInputRegisters(1, 2)).err(),
            Some(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            answer(&mut s, Request::ReadHoldingRegisters(12, 1)).err(),
            Some(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            answer(&mut s, Request::WriteSingleRegister(0, 1)).err(),
            Some(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            answer(&mut s, Request::ReadInputRegisters(0, 126)).err(),
            Some(ExceptionCode::IllegalDataValue)
        );
    }
}
