//! A service computing its start-up reports in the background still answers
//! a search by upload at once: interactive requests never queue behind
//! background verification (which decodes and embeds every image of every
//! candidate pair).

mod support;

use anyhow::Result;
use serde_json::Value;
use support::*;

async fn precomputed_reports(client: &awc::Client, server: &RunningServer) -> Result<Value> {
    let status = send(
        client.get(server.url("/api/v1/collections/shop/status")),
        Body::Empty,
    )
    .await?;
    assert_eq!(status.status, 200);
    Ok(status.json()["precomputed_reports"].clone())
}

#[test]
fn uploads_are_answered_while_reports_are_computed() -> Result<()> {
    // About 45 images in near pairs: the first verified report embeds each
    // of them again, dozens of forward passes against one per search.
    let fixture = Fixture::with_extra_pictures(24)?;
    let settings = vitrine_service::ServeSettings {
        precompute: true,
        // Searches answer in well under a second; before background work had
        // threads of its own, a search could wait for a whole round of checks.
        request_timeout_s: 10,
        ..test_settings()
    };
    let server = RunningServer::start(fixture.config(settings))?;
    actix_web::rt::System::new().block_on(async {
        let client = client();
        let query = png_bytes(&picture(1, 7, 128));
        let mut answered_during_computation = 0;
        for attempt in 0.. {
            assert!(attempt < 2000, "the reports were never computed");
            let before = precomputed_reports(&client, &server).await?;
            let search = send(
                client.post(server.url("/api/v1/collections/shop/search?k=3")),
                Body::Raw("image/png".into(), query.clone()),
            )
            .await?;
            assert_eq!(
                search.status,
                200,
                "search while reports are {before}: {}",
                String::from_utf8_lossy(&search.bytes)
            );
            let after = precomputed_reports(&client, &server).await?;
            if before == "computing" && after == "computing" {
                answered_during_computation += 1;
                if answered_during_computation == 3 {
                    break;
                }
            }
            if after != "computing" && after != "queued" {
                assert_eq!(after, "ready", "the reports must be computed in the end");
                break;
            }
        }
        assert!(
            answered_during_computation > 0,
            "no search overlapped the background computation"
        );
        Ok(())
    })
}
