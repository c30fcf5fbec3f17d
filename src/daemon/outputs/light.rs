//! A stack light on Modbus coils (TCP, or RTU on a serial line).
//!
//! The coils are written whenever the light's state changes and again every `refresh_ms`, so
//! a relay module that resets after a power blip, or that switches its outputs off when it
//! hears nothing for a while (its communication watchdog), comes back to the right state. The
//! lamps for "normal" (green) are written only while the engine loop is alive: if it stalls
//! for five seconds the light goes to "off". On shutdown the light is left "off": not
//! monitoring.
//!
//! Advisory only: never wire these coils in place of an emergency stop or a safety-rated
//! circuit.

use std::time::Duration;

use tokio_modbus::client::{Context, Writer};
use tokio_modbus::slave::Slave;

use super::{Feeds, backoff};
use crate::config::{ModbusLink, Output, StackLight};
use crate::daemon::clock::now_ms;
use crate::daemon::hub::Light;

/// Engine loop silence after which the light shows "off".
const STALL_MS: i64 = 5000;

async fn connect(s: &StackLight) -> Result<Context, String> {
    let slave = Slave(s.unit_id);
    match &s.link {
        ModbusLink::Tcp { host, port } => {
            let addr = tokio::net::lookup_host((host.as_str(), *port))
                .await
                .map_err(|e| format!("cannot resolve {host}: {e}"))?
                .next()
                .ok_or_else(|| format!("{host} has no address"))?;
            tokio::time::timeout(
                Duration::from_secs(5),
                tokio_modbus::client::tcp::connect_slave(addr, slave),
            )
            .await
            .map_err(|_| format!("no answer from {addr} within 5 s"))?
            .map_err(|e| format!("cannot connect to {addr}: {e}"))
        }
        ModbusLink::Rtu {
            port,
            baud,
            parity,
            stop_bits,
        } => {
            use tokio_serial::SerialPortBuilderExt;
            let serial = tokio_serial::new(port, *baud)
                .parity(match parity.as_str() {
                    "even" => tokio_serial::Parity::Even,
                    "odd" => tokio_serial::Parity::Odd,
                    _ => tokio_serial::Parity::None,
                })
                .stop_bits(if *stop_bits == 2 {
                    tokio_serial::StopBits::Two
                } else {
                    tokio_serial::StopBits::One
                })
                .open_native_async()
                .map_err(|e| format!("cannot open {port}: {e}"))?;
            Ok(tokio_modbus::client::rtu::attach_slave(serial, slave))
        }
    }
}

/// Writes the lamps of `state`: the listed ones on, every other coil off.
async fn show(ctx: &mut Context, s: &StackLight, state: Light) -> Result<(), String> {
    let on = s.lamps.get(state.name()).cloned().unwrap_or_default();
    for (lamp, addr) in &s.coils {
        let want = on.contains(lamp);
        let r = tokio::time::timeout(Duration::from_secs(2), ctx.write_single_coil(*addr, want))
            .await
            .map_err(|_| format!("no answer writing coil {addr} ({lamp}) within 2 s"))?;
        match r {
            Ok(Ok(())) => {}
            Ok(Err(code)) => {
                return Err(format!("the module refused coil {addr} ({lamp}): {code:?}"));
            }
            Err(e) => return Err(format!("writing coil {addr} ({lamp}): {e}")),
        }
    }
    Ok(())
}

pub async fn run(_o: Output, s: StackLight, mut f: Feeds) {
    let mut attempt = 0;
    let mut down_since: Option<tokio::time::Instant> = None;
    'connect: loop {
        let mut ctx = tokio::select! {
            c = connect(&s) => match c {
                Ok(c) => c,
                Err(e) => {
                    f.failed();
                    if down_since.is_none() {
                        tracing::warn!("stack light unreachable: {e}; retrying");
                        down_since = Some(tokio::time::Instant::now());
                    }
                    tokio::select! {
                        _ = tokio::time::sleep(backoff(attempt).min(Duration::from_secs(10))) => {}
                        _ = f.shutdown.changed() => return,
                    }
                    attempt += 1;
                    continue 'connect;
                }
            },
            _ = f.shutdown.changed() => return,
        };
        let mut shown: Option<Light> = None;
        loop {
            let mut state = *f.light.borrow_and_update();
            let stalled =
                now_ms() - f.progress.load(std::sync::atomic::Ordering::Relaxed) > STALL_MS;
            if stalled {
                state = Light::Off;
            }
            match show(&mut ctx, &s, state).await {
                Ok(()) => {
                    attempt = 0;
                    if let Some(t) = down_since.take() {
                        tracing::warn!(
                            "stack light reachable again after {:.1} s",
                            t.elapsed().as_secs_f64()
                        );
                    }
                    if shown != Some(state) {
                        tracing::info!(
                            "stack light: {}{}",
                            state.name(),
                            if stalled {
                                " (the engine loop has stalled)"
                            } else {
                                ""
                            }
                        );
                        shown = Some(state);
                    }
                }
                Err(e) => {
                    f.failed();
                    tracing::warn!("stack light lost: {e}; reconnecting");
                    down_since.get_or_insert_with(tokio::time::Instant::now);
                    continue 'connect;
                }
            }
            tokio::select! {
                r = f.light.changed() => if r.is_err() { break 'connect },
                _ = tokio::time::sleep(Duration::from_millis(s.refresh_ms)) => {}
                _ = f.shutdown.changed() => break,
            }
        }
        // Not monitoring any more: say so on the light.
        match tokio::time::timeout(Duration::from_secs(3), show(&mut ctx, &s, Light::Off)).await {
            Ok(Ok(())) => tracing::info!("stack light: off (not monitoring)"),
            _ => tracing::warn!("could not switch the stack light off at shutdown"),
        }
        return;
    }
}
