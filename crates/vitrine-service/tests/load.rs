//! A bounded concurrent load (neighbour queries and searches by uploaded
//! image over 32 connections) while an index job writes the collection:
//! every request must succeed.

mod support;

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Instant;

use anyhow::Result;
use futures_util::future::join_all;
use support::*;

const CONNECTIONS: usize = 32;
const REQUESTS: usize = 2000;
/// One request in this many is a search by uploaded image (a forward pass).
const UPLOAD_EVERY: usize = 50;
const NEW_IMAGES: usize = 12;

#[test]
fn concurrent_queries_succeed_while_an_index_job_runs() -> Result<()> {
    let fixture = Fixture::new()?;
    let server = RunningServer::start(fixture.config(test_settings()))?;
    // New files for the rescan to embed while the load runs.
    let dir = fixture.root.join("train/extra");
    std::fs::create_dir_all(&dir)?;
    for i in 0..NEW_IMAGES {
        picture(i % 3, 100 + i as u32, 112).save(dir.join(format!("extra-{i}.png")))?;
    }
    let query_png = png_bytes(&picture(2, 77, 96));
    actix_web::rt::System::new().block_on(async {
        let client = client();
        let api = |path: &str| server.url(&format!("/api/v1/collections/shop{path}"));
        let rescan = send(
            client
                .post(api("/jobs/rescan"))
                .insert_header(("Authorization", format!("Bearer {TOKEN}"))),
            Body::Empty,
        )
        .await?;
        assert_eq!(rescan.status, 202);
        let job_id = rescan.json()["id"].as_u64().unwrap_or(0);

        let next = AtomicUsize::new(0);
        let failures = AtomicUsize::new(0);
        // When each request was sent and answered, and when the job was seen
        // running: a request overlapped the write job when a look at the job
        // between its sending and its answer saw it running.
        let spans = Mutex::new(Vec::new());
        let seen_running = Mutex::new(Vec::new());
        let load_done = AtomicBool::new(false);
        let started = Instant::now();
        let workers = (0..CONNECTIONS).map(|_| async {
            loop {
                let n = next.fetch_add(1, Ordering::Relaxed);
                if n >= REQUESTS {
                    break;
                }
                let sent = Instant::now();
                let answer = if n.is_multiple_of(UPLOAD_EVERY) {
                    send(client.post(api("/search?k=5")), Body::Raw("image/png".into(), query_png.clone())).await
                } else {
                    let id = fixture.ids[n % fixture.ids.len()];
                    send(client.get(api(&format!("/images/{id}/neighbours?k=5"))), Body::Empty).await
                };
                spans.lock().unwrap_or_else(|p| p.into_inner()).push((sent, Instant::now()));
                let ok = answer.as_ref().is_ok_and(|a| {
                    a.status == 200 && a.json()["hits"].as_array().is_some_and(|h| h.len() == 5)
                });
                if !ok {
                    failures.fetch_add(1, Ordering::Relaxed);
                    match answer {
                        Ok(a) => eprintln!("request {n}: {} {}", a.status, String::from_utf8_lossy(&a.bytes)),
                        Err(e) => eprintln!("request {n}: {e}"),
                    }
                }
            }
        });
        let load = async {
            join_all(workers).await;
            load_done.store(true, Ordering::SeqCst);
        };
        let watch = async {
            while !load_done.load(Ordering::SeqCst) {
                let job = send(client.get(api(&format!("/jobs/{job_id}"))), Body::Empty).await?.json();
                if job["state"] == "running" {
                    seen_running.lock().unwrap_or_else(|p| p.into_inner()).push(Instant::now());
                }
                actix_web::rt::time::sleep(std::time::Duration::from_millis(20)).await;
            }
            anyhow::Ok(())
        };
        let ((), watched) = futures_util::future::join(load, watch).await;
        watched?;
        let elapsed = started.elapsed().as_secs_f64();
        let spans = spans.into_inner().unwrap_or_else(|p| p.into_inner());
        let seen_running = seen_running.into_inner().unwrap_or_else(|p| p.into_inner());
        let overlapping = spans
            .iter()
            .filter(|(sent, answered)| seen_running.iter().any(|seen| sent <= seen && seen <= answered))
            .count();
        println!(
            "{REQUESTS} requests over {CONNECTIONS} connections in {elapsed:.1} s ({:.0}/s); {overlapping} answered across a moment the job was seen running",
            REQUESTS as f64 / elapsed,
        );
        assert_eq!(failures.load(Ordering::Relaxed), 0, "every request succeeds");
        assert!(overlapping > 0, "no request overlapped the running write job");
        let job = wait_for_job(&client, &server, job_id).await?;
        assert_eq!(job["state"], "succeeded", "{job}");
        assert_eq!(job["counts"]["new"], NEW_IMAGES);
        let status = send(client.get(api("/status")), Body::Empty).await?.json();
        assert_eq!(status["images"], fixture.ids.len() + NEW_IMAGES);
        anyhow::Ok(())
    })
}
