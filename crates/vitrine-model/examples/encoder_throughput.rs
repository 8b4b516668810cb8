//! Measures the encoder's forward-pass throughput, or this CPU's SGEMM rate,
//! and prints one JSON line. Driven by bench/encoder.py, which alternates it
//! with onnxruntime and reports medians.
//!
//! encoder_throughput --model DIR --threads T --batch B --iterations N
//! encoder_throughput --gemm-peak --threads T

use std::time::Instant;

use anyhow::{Context, Result};
use candle_core::{Device, Tensor};
use vitrine_model::encoder::Encoder;

// The allocator the `vitrine` binary uses, so the figures are the binary's.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn arg(args: &[String], name: &str) -> Option<String> {
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1).cloned())
}

fn main() -> Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let threads: usize = arg(&args, "--threads").unwrap_or("1".into()).parse()?;
    // candle and rayon read this before their first parallel section.
    std::env::set_var("RAYON_NUM_THREADS", threads.to_string());
    if args.iter().any(|a| a == "--gemm-peak") {
        let n = 1536;
        let a = Tensor::randn(0f32, 1.0, (n, n), &Device::Cpu)?;
        let b = Tensor::randn(0f32, 1.0, (n, n), &Device::Cpu)?;
        a.matmul(&b)?; // warm-up
        let mut best = f64::MAX;
        for _ in 0..5 {
            let started = Instant::now();
            a.matmul(&b)?;
            best = best.min(started.elapsed().as_secs_f64());
        }
        let gflops = 2.0 * (n * n * n) as f64 / best / 1e9;
        println!("{{\"sgemm_gflops\": {gflops:.2}}}");
        return Ok(());
    }
    let model = arg(&args, "--model").context("--model DIR")?;
    let batch: usize = arg(&args, "--batch").unwrap_or("1".into()).parse()?;
    let iterations: usize = arg(&args, "--iterations").unwrap_or("4".into()).parse()?;
    let encoder = Encoder::load(std::path::Path::new(&model))?;
    let side = encoder.spec().preprocess.crop as usize;
    let pixels = Tensor::randn(0f32, 1.0, (batch, 3, side, side), &Device::Cpu)?;
    encoder.model().forward(&pixels)?; // warm-up, position cache
    let started = Instant::now();
    for _ in 0..iterations {
        encoder.model().forward(&pixels)?;
    }
    let images_per_s = (batch * iterations) as f64 / started.elapsed().as_secs_f64();
    println!("{{\"images_per_s\": {images_per_s:.3}}}");
    Ok(())
}
