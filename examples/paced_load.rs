//! A paced load generator, run as its own process by `benches/external_load.sh`: sends one
//! POST body at a fixed overall rate over keep-alive HTTP/1.1 connections and reports latency
//! percentiles as one JSON line.
//!
//! Request `m` is due at `start + m / rate` and goes out on connection `m mod connections`;
//! its latency runs from when it was due, not from when it was sent, so a slow answer that
//! delays the next request on its connection is counted against both (the correction for
//! coordinated omission that wrk2 makes; wrk2 is not packaged in Debian). Timer overshoot of
//! the sleep before each request (tens of microseconds) counts as latency too.
//!
//! `paced_load ADDR PATH BODY_FILE RATE SECONDS CONNECTIONS`

use std::io::{Read, Write};
use std::net::TcpStream;
use std::time::{Duration, Instant};

struct Outcome {
    latencies_us: Vec<u64>,
    errors: usize,
}

/// Reads one HTTP/1.1 response with a `Content-Length` body; returns its status.
fn read_response(stream: &mut TcpStream, buf: &mut Vec<u8>) -> std::io::Result<u16> {
    buf.clear();
    let mut chunk = [0u8; 4096];
    let header_end = loop {
        let n = stream.read(&mut chunk)?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&chunk[..n]);
        if let Some(at) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            break at + 4;
        }
    };
    let head = String::from_utf8_lossy(&buf[..header_end]).to_ascii_lowercase();
    let status = head
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let length: usize = head
        .lines()
        .find_map(|l| l.strip_prefix("content-length:"))
        .and_then(|v| v.trim().parse().ok())
        .unwrap_or(0);
    while buf.len() < header_end + length {
        let n = stream.read(&mut chunk)?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&chunk[..n]);
    }
    Ok(status)
}

fn connection(
    addr: String,
    request: Vec<u8>,
    start: Instant,
    first: u64,
    step: u64,
    rate: f64,
    end: Duration,
) -> Outcome {
    let mut out = Outcome {
        latencies_us: Vec::new(),
        errors: 0,
    };
    let mut stream = match TcpStream::connect(&addr) {
        Ok(s) => s,
        Err(_) => {
            out.errors += 1;
            return out;
        }
    };
    let _ = stream.set_nodelay(true);
    let mut buf = Vec::with_capacity(8192);
    let mut m = first;
    loop {
        let due = Duration::from_secs_f64(m as f64 / rate);
        if due >= end {
            break;
        }
        if let Some(wait) = due.checked_sub(start.elapsed()) {
            std::thread::sleep(wait);
        }
        let ok = stream.write_all(&request).is_ok()
            && matches!(read_response(&mut stream, &mut buf), Ok(200));
        if ok {
            let latency = start.elapsed().saturating_sub(due);
            out.latencies_us.push(latency.as_micros() as u64);
        } else {
            out.errors += 1;
            match TcpStream::connect(&addr) {
                Ok(s) => stream = s,
                Err(_) => break,
            }
        }
        m += step;
    }
    out
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() != 7 {
        eprintln!("usage: paced_load ADDR PATH BODY_FILE RATE SECONDS CONNECTIONS");
        std::process::exit(2);
    }
    let addr = args[1].clone();
    let path = &args[2];
    let body = std::fs::read(&args[3]).expect("reading the body file");
    let rate: f64 = args[4].parse().expect("RATE is a number");
    let seconds: f64 = args[5].parse().expect("SECONDS is a number");
    let connections: u64 = args[6].parse().expect("CONNECTIONS is a count");
    let mut request = format!(
        "POST {path} HTTP/1.1\r\nhost: {addr}\r\ncontent-type: application/json\r\ncontent-length: {}\r\n\r\n",
        body.len()
    )
    .into_bytes();
    request.extend_from_slice(&body);

    let start = Instant::now() + Duration::from_millis(200);
    let end = Duration::from_secs_f64(seconds);
    let threads: Vec<_> = (0..connections)
        .map(|i| {
            let (addr, request) = (addr.clone(), request.clone());
            std::thread::spawn(move || {
                if let Some(wait) = start.checked_duration_since(Instant::now()) {
                    std::thread::sleep(wait);
                }
                connection(addr, request, start, i, connections, rate, end)
            })
        })
        .collect();
    let mut latencies = Vec::new();
    let mut errors = 0;
    for t in threads {
        let out = t.join().expect("connection thread");
        latencies.extend(out.latencies_us);
        errors += out.errors;
    }
    let elapsed = start.elapsed().as_secs_f64();
    latencies.sort_unstable();
    let pct = |q: f64| -> f64 {
        if latencies.is_empty() {
            return f64::NAN;
        }
        let k = ((latencies.len() as f64 - 1.0) * q).round() as usize;
        latencies[k] as f64 / 1000.0
    };
    println!(
        "{{\"target_rate\": {rate}, \"achieved_rate\": {:.1}, \"requests\": {}, \"errors\": {errors}, \"p50_ms\": {:.3}, \"p99_ms\": {:.3}, \"p999_ms\": {:.3}, \"max_ms\": {:.3}}}",
        latencies.len() as f64 / elapsed,
        latencies.len(),
        pct(0.5),
        pct(0.99),
        pct(0.999),
        pct(1.0)
    );
}
