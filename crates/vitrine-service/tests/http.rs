//! Every endpoint over real HTTP against a real server and a real sled store
//! filled from generated image files; then a barrage of bad requests.

mod support;

use anyhow::Result;
use serde_json::{json, Value};
use support::*;

fn ids_of(hits: &Value) -> Vec<u64> {
    hits["hits"]
        .as_array()
        .map(|a| a.iter().filter_map(|h| h["id"].as_u64()).collect())
        .unwrap_or_default()
}

#[test]
fn every_endpoint_over_http() -> Result<()> {
    let fixture = Fixture::new()?;
    let server = RunningServer::start(fixture.config(test_settings()))?;
    actix_web::rt::System::new().block_on(async {
        let client = client();
        let get = |path: &str| send(client.get(server.url(path)), Body::Empty);
        let api = |path: &str| format!("/api/v1/collections/shop{path}");
        let n_images = fixture.ids.len();

        // Collections and status: counts against the files written.
        let list = get("/api/v1/collections").await?;
        assert_eq!(list.status, 200);
        assert_eq!(list.json()["collections"][0]["name"], "shop");
        let status = get(&api("/status")).await?.json();
        // 3 labels x 6 images + the leaked copy + 2 unsorted; broken.jpg fails.
        assert_eq!(status["images"], 21);
        assert_eq!(n_images, 21);
        assert_eq!(status["errors"], 1);
        assert_eq!(status["splits"]["train"], 12);
        assert_eq!(status["splits"]["val"], 7);
        assert_eq!(status["labels"]["(none)"], 2);
        assert_eq!(status["model"]["dimension"], 384);
        assert_eq!(status["model_loaded"], true);

        let errors = get(&api("/errors?page=1&per_page=10")).await?.json();
        assert_eq!(errors["total"], 1);
        assert_eq!(errors["items"][0]["path"], "train/lamp/broken.jpg");

        // Listing: filters and paging.
        let lamps = get(&api("/images?split=train&label=lamp")).await?.json();
        assert_eq!(lamps["total"], 4);
        let page2 = get(&api("/images?per_page=5&page=2")).await?.json();
        assert_eq!(page2["total"], 21);
        assert_eq!(page2["items"].as_array().map(Vec::len), Some(5));
        let prefixed = get(&api("/images?prefix=unsorted/")).await?.json();
        assert_eq!(prefixed["total"], 2);

        // Metadata against the file itself: BLAKE3 of its bytes (the blake3
        // crate's reference implementation) and dimensions (the image crate).
        let id = fixture.id_of("train/teapot/teapot-1.png");
        let file = fixture.root.join("train/teapot/teapot-1.png");
        let meta = get(&api(&format!("/images/{id}"))).await?.json();
        assert_eq!(meta["path"], "train/teapot/teapot-1.png");
        assert_eq!(meta["split"], "train");
        assert_eq!(meta["label"], "teapot");
        assert_eq!(meta["content_hash"], blake3::hash(&std::fs::read(&file)?).to_hex().as_str());
        assert_eq!(meta["byte_size"], std::fs::metadata(&file)?.len());
        let (w, h) = image::image_dimensions(&file)?;
        assert_eq!((meta["width"].as_u64(), meta["height"].as_u64()), (Some(w.into()), Some(h.into())));

        // Thumbnail: a JPEG (decoded by the image crate) whose longer side is
        // the requested size; a size over the cap is capped.
        let thumb = get(&api(&format!("/images/{id}/thumbnail?size=48"))).await?;
        assert_eq!(thumb.status, 200);
        assert_eq!(thumb.content_type, "image/jpeg");
        let decoded = image::load_from_memory_with_format(&thumb.bytes, image::ImageFormat::Jpeg)?;
        assert_eq!((decoded.width(), decoded.height()), (48, 48));
        let again = get(&api(&format!("/images/{id}/thumbnail?size=48"))).await?;
        assert_eq!(again.bytes, thumb.bytes, "the cached thumbnail is the same");
        let capped = get(&api(&format!("/images/{id}/thumbnail?size=100000"))).await?;
        let capped = image::load_from_memory(&capped.bytes)?;
        assert!(capped.width() <= 512, "thumbnail sizes are capped");

        // Neighbours against exact brute force over the stored embeddings.
        let row = fixture.ids.iter().position(|&i| i == id).expect("indexed");
        let expected = brute_force(&fixture, &fixture.embeddings[row], Some(id), 5);
        let hits = get(&api(&format!("/images/{id}/neighbours?k=5"))).await?.json();
        assert_eq!(ids_of(&hits), expected.iter().map(|(i, _)| *i).collect::<Vec<_>>());
        for (hit, (_, similarity)) in hits["hits"].as_array().into_iter().flatten().zip(&expected) {
            assert!((hit["similarity"].as_f64().unwrap_or(9.0) - f64::from(*similarity)).abs() < 1e-4);
        }
        let filtered = get(&api(&format!("/images/{id}/neighbours?k=50&split=val&label=lamp"))).await?.json();
        assert_eq!(ids_of(&filtered).len(), 2);
        assert!(filtered["hits"].as_array().into_iter().flatten().all(|h| h["split"] == "val" && h["label"] == "lamp"));

        // Search by vector: the stored embedding finds its own image first.
        let by_vector = send(
            client.post(server.url(&api("/search/vector"))),
            Body::Json(json!({"vector": fixture.embeddings[row], "k": 3})),
        )
        .await?
        .json();
        assert_eq!(ids_of(&by_vector)[0], id);

        // Search by image, raw and multipart: the indexed file itself is the
        // best hit with cosine similarity ~1.
        let bytes = std::fs::read(&file)?;
        let raw = send(
            client.post(server.url(&api("/search?k=3"))),
            Body::Raw("image/png".into(), bytes.clone()),
        )
        .await?;
        assert_eq!(raw.status, 200, "{}", String::from_utf8_lossy(&raw.bytes));
        let raw = raw.json();
        assert_eq!(raw["hits"][0]["id"], id);
        assert!(raw["hits"][0]["similarity"].as_f64().unwrap_or(0.0) > 0.999);
        let (content_type, form) = multipart(&[("file", "query.png", &bytes)]);
        let multi = send(client.post(server.url(&api("/search?k=3&split=train"))), Body::Raw(content_type, form)).await?;
        assert_eq!(multi.json()["hits"][0]["id"], id);

        // Duplicates: the byte copy forms a group of tier "bytes".
        let duplicates = get(&api("/duplicates")).await?.json();
        let copy_id = fixture.id_of("val/kettle/kettle-copy.png");
        let original_id = fixture.id_of("train/kettle/kettle-0.png");
        let group = duplicates["groups"]
            .as_array()
            .into_iter()
            .flatten()
            .find(|g| g["members"].as_array().into_iter().flatten().any(|m| m["id"] == copy_id))
            .expect("the copy is in a duplicate group");
        assert!(group["members"].as_array().into_iter().flatten().any(|m| m["id"] == original_id));
        assert!(duplicates["total"].as_u64() >= Some(1));
        // The model is loaded, so near pairs went through the finer check;
        // asked not to, the answer says so.
        assert_eq!(duplicates["verification"]["applied"], true, "{duplicates}");
        let unverified = get(&api("/duplicates?verify=false&threshold=0.95")).await?.json();
        assert_eq!(unverified["verification"]["applied"], false, "{unverified}");
        assert_eq!(unverified["threshold"], 0.95);

        // Leaks: the val copy leaks from train.
        let leaks = get(&api("/leaks?split=val&against=train")).await?.json();
        assert_eq!(leaks["reference_split"], "train");
        let leak = leaks["leaks"]
            .as_array()
            .into_iter()
            .flatten()
            .find(|l| l["id"] == copy_id)
            .expect("the copy leaks");
        assert_eq!(leak["tier"], "bytes");
        assert_eq!(leak["counterpart"]["id"], original_id);
        assert_eq!(leaks["summary"][0]["split"], "val");
        assert_eq!(leaks["summary"][0]["images"], 7);

        // Clusters: sizes add up to the collection; members page through one.
        let clusters = get(&api("/clusters?k=3&seed=1")).await?.json();
        assert_eq!(clusters["n_clusters"], 3);
        let sizes: Vec<u64> = clusters["clusters"].as_array().into_iter().flatten().filter_map(|c| c["size"].as_u64()).collect();
        assert_eq!(sizes.iter().sum::<u64>(), 21);
        let first = &clusters["clusters"][0];
        let members = get(&api(&format!("/clusters/{}?k=3&seed=1&per_page=100", first["index"]))).await?.json();
        assert_eq!(members["total"], first["size"]);
        assert_eq!(members["items"].as_array().map(Vec::len) as Option<usize>, first["size"].as_u64().map(|s| s as usize));

        // Labels: the two unsorted images get a judgement by either method,
        // the classifier's with its expected accuracy; suspects come with
        // counts for each of the three labels.
        let suggestions = get(&api("/labels/suggestions?min_confidence=0.5")).await?.json();
        assert_eq!(suggestions["total"], 2);
        assert_eq!(suggestions["method"], "classifier");
        assert_eq!(suggestions["cut"], 0.5);
        let voted = get(&api("/labels/suggestions?method=neighbour_vote&k=5")).await?.json();
        assert_eq!(voted["total"], 2);
        assert_eq!(voted["method"], "neighbour_vote");
        assert!(voted["expected_accuracy"].is_null());
        let suspects = get(&api("/labels/suspects")).await?;
        assert_eq!(suspects.status, 200);
        assert!(suspects.json()["items"].is_array());
        let per_label = suspects.json()["per_label"].clone();
        assert_eq!(per_label.as_array().map(Vec::len), Some(LABELS.len()), "{per_label}");
        for count in per_label.as_array().into_iter().flatten() {
            assert_eq!(count["labelled"], if count["label"] == "kettle" { 7 } else { 6 }, "{count}");
        }

        // Writes: rescan (nothing changed), then an upload, then reclustering.
        let bearer = ("Authorization", format!("Bearer {TOKEN}"));
        let rescan = send(client.post(server.url(&api("/jobs/rescan"))).insert_header(bearer.clone()), Body::Empty).await?;
        assert_eq!(rescan.status, 202);
        let job = wait_for_job(&client, &server, rescan.json()["id"].as_u64().unwrap_or(0)).await?;
        assert_eq!(job["state"], "succeeded", "{job}");
        assert_eq!(job["counts"]["unchanged"], 21);
        assert_eq!(job["counts"]["new"], 0);

        let new_picture = png_bytes(&picture(1, 40, 80));
        let (content_type, form) = multipart(&[("file", "new lamp!.png", &new_picture)]);
        let upload = send(
            client.post(server.url(&api("/images?split=train&label=lamp"))).insert_header(bearer.clone()),
            Body::Raw(content_type.clone(), form.clone()),
        )
        .await?;
        assert_eq!(upload.status, 202, "{}", String::from_utf8_lossy(&upload.bytes));
        let upload = upload.json();
        assert_eq!(upload["saved"][0], "uploads/train/lamp/newlamp.png");
        let job = wait_for_job(&client, &server, upload["job"]["id"].as_u64().unwrap_or(0)).await?;
        assert_eq!(job["state"], "succeeded", "{job}");
        assert_eq!(job["counts"]["new"], 1);
        // The same name again is saved beside it, never over it.
        let second = send(
            client.post(server.url(&api("/images?split=train&label=lamp"))).insert_header(bearer.clone()),
            Body::Raw(content_type, form),
        )
        .await?
        .json();
        assert_eq!(second["saved"][0], "uploads/train/lamp/newlamp-1.png");
        wait_for_job(&client, &server, second["job"]["id"].as_u64().unwrap_or(0)).await?;
        assert_eq!(std::fs::read(fixture.root.join("uploads/train/lamp/newlamp.png"))?, new_picture);
        let status = get(&api("/status")).await?.json();
        assert_eq!(status["images"], 23);
        let uploaded = get(&api("/images?prefix=uploads/")).await?.json();
        assert_eq!(uploaded["total"], 2);
        assert_eq!(uploaded["items"][0]["label"], "lamp");

        let recluster = send(client.post(server.url(&api("/jobs/clusters?k=2"))).insert_header(bearer), Body::Empty).await?;
        assert_eq!(recluster.status, 202);
        let job = wait_for_job(&client, &server, recluster.json()["id"].as_u64().unwrap_or(0)).await?;
        assert_eq!(job["state"], "succeeded");

        // System endpoints.
        assert_eq!(get("/healthz").await?.json()["status"], "ok");
        assert_eq!(get("/readyz").await?.json()["ready"], true);
        let metrics = String::from_utf8(get("/metrics").await?.bytes)?;
        assert!(metrics.contains("vitrine_http_requests_total{method=\"GET\",route=\"/api/v1/collections/{collection}/status\",status=\"200\"}"), "{metrics}");
        assert!(metrics.contains("vitrine_index_images{collection=\"shop\"} 23"));
        assert!(metrics.contains("vitrine_jobs{state=\"succeeded\"} 4"));
        let openapi = get("/openapi.json").await?.json();
        let expected: Value = serde_json::from_str(&vitrine_service::openapi_json())?;
        assert_eq!(openapi, expected);
        let page = get("/").await?;
        assert_eq!(page.status, 200);
        assert!(page.content_type.starts_with("text/html"));
        Ok(())
    })
}

/// Every kind of client mistake answers 4xx with our JSON error code, and
/// afterwards the server still answers the same as before.
#[test]
fn bad_requests_get_json_errors_and_change_nothing() -> Result<()> {
    let fixture = Fixture::new()?;
    let files_before = list_files(&fixture.root);
    let id = fixture.id_of("train/lamp/lamp-2.png");
    {
        let server = RunningServer::start(fixture.config(test_settings()))?;
        actix_web::rt::System::new().block_on(async {
            let client = client();
            let api = |path: &str| server.url(&format!("/api/v1/collections/shop{path}"));
            let snapshot = || async {
                let status = send(client.get(api("/status")), Body::Empty).await?.json();
                let neighbours = send(
                    client.get(api(&format!("/images/{id}/neighbours?k=5"))),
                    Body::Empty,
                )
                .await?
                .json();
                anyhow::Ok((status, neighbours))
            };
            let before = snapshot().await?;

            let good_png = std::fs::read(fixture.root.join("train/lamp/lamp-2.png"))?;
            let huge_png = png_bytes(&image::RgbImage::new(1100, 1000)); // 1.1 MP > 1 MP limit, a few kB
            let oversized = vec![0u8; (1 << 20) + 10];
            let zero_vector = vec![0.0f32; 384];
            let (garbled_type, _) = multipart(&[]);
            let (form_type, text_form) = multipart(&[("file", "notes.txt", b"hello")]);
            let wrong_bearer = ("Authorization", "Bearer wrong".to_owned());
            let bearer = ("Authorization", format!("Bearer {TOKEN}"));

            let cases: Vec<(&str, awc::ClientRequest, Body, u16, &str)> = vec![
                (
                    "unknown collection",
                    client.get(server.url("/api/v1/collections/nope/status")),
                    Body::Empty,
                    404,
                    "unknown_collection",
                ),
                (
                    "collection traversal",
                    client.get(server.url("/api/v1/collections/..%2F..%2Fetc/status")),
                    Body::Empty,
                    404,
                    "unknown_collection",
                ),
                (
                    "unknown id",
                    client.get(api("/images/987654321")),
                    Body::Empty,
                    404,
                    "unknown_image",
                ),
                (
                    "unknown split in a listing",
                    client.get(api("/images?split=tset")),
                    Body::Empty,
                    400,
                    "unknown_split",
                ),
                (
                    "unknown label for neighbours",
                    client.get(api(&format!("/images/{id}/neighbours?label=lampp"))),
                    Body::Empty,
                    400,
                    "unknown_label",
                ),
                (
                    "filters no image passes",
                    client.post(api("/search/vector")),
                    Body::Json(json!({
                        "vector": vec![0.5f32; 384],
                        "split": "val",
                        "prefix": "train/",
                    })),
                    400,
                    "no_image_matches",
                ),
                (
                    "leaks against an unknown split",
                    client.get(api("/leaks?against=nosuch&verify=false")),
                    Body::Empty,
                    400,
                    "unknown_split",
                ),
                (
                    "id not a number",
                    client.get(api("/images/abc")),
                    Body::Empty,
                    400,
                    "invalid_path",
                ),
                (
                    "negative id",
                    client.get(api("/images/-1")),
                    Body::Empty,
                    400,
                    "invalid_path",
                ),
                (
                    "id traversal",
                    client.get(api("/images/..%2F..%2Fetc%2Fpasswd/thumbnail")),
                    Body::Empty,
                    400,
                    "invalid_path",
                ),
                (
                    "static traversal",
                    client.get(server.url("/static/..%2F..%2FCargo.toml")),
                    Body::Empty,
                    404,
                    "not_found",
                ),
                (
                    "unknown route",
                    client.get(server.url("/api/v1/nothing")),
                    Body::Empty,
                    404,
                    "not_found",
                ),
                (
                    "wrong method",
                    client.delete(api("/status")),
                    Body::Empty,
                    404,
                    "not_found",
                ),
                (
                    "negative k",
                    client.get(api(&format!("/images/{id}/neighbours?k=-1"))),
                    Body::Empty,
                    400,
                    "invalid_query",
                ),
                (
                    "zero k",
                    client.get(api(&format!("/images/{id}/neighbours?k=0"))),
                    Body::Empty,
                    400,
                    "k_out_of_range",
                ),
                (
                    "huge k",
                    client.get(api(&format!("/images/{id}/neighbours?k=100000"))),
                    Body::Empty,
                    400,
                    "k_out_of_range",
                ),
                (
                    "overflowing k",
                    client.get(api(&format!(
                        "/images/{id}/neighbours?k=99999999999999999999999"
                    ))),
                    Body::Empty,
                    400,
                    "invalid_query",
                ),
                (
                    "k not a number",
                    client.get(api(&format!("/images/{id}/neighbours?k=ten"))),
                    Body::Empty,
                    400,
                    "invalid_query",
                ),
                (
                    "page zero",
                    client.get(api("/images?page=0")),
                    Body::Empty,
                    400,
                    "page_out_of_range",
                ),
                (
                    "page too big",
                    client.get(api("/images?per_page=100000")),
                    Body::Empty,
                    400,
                    "page_size_out_of_range",
                ),
                (
                    "threshold out of range",
                    client.get(api("/duplicates?threshold=2")),
                    Body::Empty,
                    400,
                    "threshold_out_of_range",
                ),
                (
                    "candidate threshold out of range",
                    client.get(api("/duplicates?candidate_threshold=-3")),
                    Body::Empty,
                    400,
                    "threshold_out_of_range",
                ),
                (
                    "verify not a boolean",
                    client.get(api("/leaks?verify=maybe")),
                    Body::Empty,
                    400,
                    "invalid_query",
                ),
                (
                    "threshold NaN",
                    client.get(api("/leaks?threshold=NaN")),
                    Body::Empty,
                    400,
                    "threshold_out_of_range",
                ),
                (
                    "zero clusters",
                    client.get(api("/clusters?k=0")),
                    Body::Empty,
                    400,
                    "k_out_of_range",
                ),
                (
                    "unknown cluster",
                    client.get(api("/clusters/999?k=2")),
                    Body::Empty,
                    404,
                    "unknown_cluster",
                ),
                (
                    "confidence out of range",
                    client.get(api("/labels/suggestions?min_confidence=2")),
                    Body::Empty,
                    400,
                    "share_out_of_range",
                ),
                (
                    "thumbnail size zero",
                    client.get(api(&format!("/images/{id}/thumbnail?size=0"))),
                    Body::Empty,
                    400,
                    "invalid_size",
                ),
                (
                    "unknown job",
                    client.get(api("/jobs/424242")),
                    Body::Empty,
                    404,
                    "unknown_job",
                ),
                (
                    "malformed JSON",
                    client.post(api("/search/vector")),
                    Body::Raw("application/json".into(), b"{\"vector\": [".to_vec()),
                    400,
                    "invalid_json",
                ),
                (
                    "wrong JSON type",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"vector": "up"})),
                    400,
                    "invalid_json",
                ),
                (
                    "missing JSON field",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"k": 3})),
                    400,
                    "invalid_json",
                ),
                (
                    "unknown JSON field",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"vector": [1.0], "colour": "red"})),
                    400,
                    "invalid_json",
                ),
                (
                    "negative k in JSON",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"vector": zero_vector, "k": -3})),
                    400,
                    "invalid_json",
                ),
                (
                    "wrong dimension",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"vector": [1.0, 2.0, 3.0]})),
                    400,
                    "dimension_mismatch",
                ),
                (
                    "zero vector",
                    client.post(api("/search/vector")),
                    Body::Json(json!({"vector": zero_vector})),
                    400,
                    "invalid_vector",
                ),
                (
                    "JSON as text",
                    client.post(api("/search/vector")),
                    Body::Raw("text/plain".into(), b"{}".to_vec()),
                    415,
                    "unsupported_media_type",
                ),
                (
                    "oversized JSON",
                    client.post(api("/search/vector")),
                    Body::Raw("application/json".into(), oversized.clone()),
                    413,
                    "payload_too_large",
                ),
                (
                    "search with text",
                    client.post(api("/search")),
                    Body::Raw("text/plain".into(), b"hello".to_vec()),
                    415,
                    "unsupported_media_type",
                ),
                (
                    "search with non-image",
                    client.post(api("/search")),
                    Body::Raw("image/png".into(), b"hello, not a png".to_vec()),
                    422,
                    "not_an_image",
                ),
                (
                    "search with empty body",
                    client.post(api("/search")),
                    Body::Raw("image/png".into(), Vec::new()),
                    400,
                    "no_image",
                ),
                (
                    "search oversized",
                    client.post(api("/search")),
                    Body::Raw("image/jpeg".into(), oversized.clone()),
                    413,
                    "payload_too_large",
                ),
                (
                    "decompression bomb",
                    client.post(api("/search")),
                    Body::Raw("image/png".into(), huge_png.clone()),
                    413,
                    "too_many_pixels",
                ),
                (
                    "garbled multipart",
                    client.post(api("/search")),
                    Body::Raw(garbled_type, b"garbage without boundaries".to_vec()),
                    400,
                    "malformed_multipart",
                ),
                (
                    "search with k too big",
                    client.post(api("/search?k=1000")),
                    Body::Raw("image/png".into(), good_png.clone()),
                    400,
                    "k_out_of_range",
                ),
                (
                    "upload without token",
                    client.post(api("/images")),
                    Body::Raw("image/png".into(), good_png.clone()),
                    401,
                    "missing_token",
                ),
                (
                    "upload with wrong token",
                    client
                        .post(api("/images"))
                        .insert_header(wrong_bearer.clone()),
                    Body::Raw("image/png".into(), good_png.clone()),
                    403,
                    "invalid_token",
                ),
                (
                    "upload of text",
                    client.post(api("/images")).insert_header(bearer.clone()),
                    Body::Raw(form_type, text_form),
                    422,
                    "not_an_image",
                ),
                (
                    "upload bomb",
                    client.post(api("/images")).insert_header(bearer.clone()),
                    Body::Raw("image/png".into(), huge_png),
                    413,
                    "too_many_pixels",
                ),
                (
                    "upload into a bad split",
                    client
                        .post(api("/images?split=..%2F..%2Fetc"))
                        .insert_header(bearer.clone()),
                    Body::Raw("image/png".into(), good_png.clone()),
                    400,
                    "invalid_split",
                ),
                (
                    "upload with a bad label",
                    client
                        .post(api("/images?split=train&label=..%2Fx"))
                        .insert_header(bearer.clone()),
                    Body::Raw("image/png".into(), good_png.clone()),
                    400,
                    "invalid_label",
                ),
                (
                    "upload label without split",
                    client
                        .post(api("/images?label=lamp"))
                        .insert_header(bearer.clone()),
                    Body::Raw("image/png".into(), good_png),
                    400,
                    "label_without_split",
                ),
                (
                    "rescan without token",
                    client.post(api("/jobs/rescan")),
                    Body::Empty,
                    401,
                    "missing_token",
                ),
                (
                    "rescan with wrong token",
                    client.post(api("/jobs/rescan")).insert_header(wrong_bearer),
                    Body::Empty,
                    403,
                    "invalid_token",
                ),
            ];
            for (what, request, body, status, code) in cases {
                let answer = send(request, body).await?;
                assert_eq!(
                    (answer.status, answer.error_code().as_str()),
                    (status, code),
                    "{what}: {}",
                    String::from_utf8_lossy(&answer.bytes)
                );
                assert!(
                    answer.content_type.starts_with("application/json"),
                    "{what}"
                );
            }

            assert_eq!(
                send(client.get(server.url("/healthz")), Body::Empty)
                    .await?
                    .status,
                200
            );
            assert_eq!(
                snapshot().await?,
                before,
                "status and neighbours are unchanged"
            );
            anyhow::Ok(())
        })?;
    }
    assert_eq!(
        list_files(&fixture.root),
        files_before,
        "no file was written"
    );

    // The same store served without any token: writes are disabled.
    let settings = vitrine_service::ServeSettings {
        token: None,
        ..test_settings()
    };
    let server = RunningServer::start(fixture.config(settings))?;
    actix_web::rt::System::new().block_on(async {
        let client = client();
        let answer = send(
            client
                .post(server.url("/api/v1/collections/shop/jobs/rescan"))
                .insert_header(("Authorization", format!("Bearer {TOKEN}"))),
            Body::Empty,
        )
        .await?;
        assert_eq!(
            (answer.status, answer.error_code().as_str()),
            (403, "writes_disabled")
        );
        anyhow::Ok(())
    })
}

/// Listening anywhere but on loopback needs a token.
#[test]
fn public_address_needs_a_token() -> Result<()> {
    let settings = vitrine_service::ServeSettings {
        bind: "0.0.0.0".into(),
        token: None,
        port: 0,
        ..vitrine_service::ServeSettings::default()
    };
    let config = vitrine_service::ServiceConfig {
        settings,
        collections: Vec::new(),
        model: vitrine_service::Model::Missing("not needed".into()),
        index: index_options(),
        duplicates: Default::default(),
        reference_split: Some("train".into()),
    };
    let refused = actix_web::rt::System::new()
        .block_on(async { vitrine_service::Service::bind(config).err() });
    assert!(matches!(
        refused,
        Some(vitrine_service::ServiceError::PublicBindWithoutToken { .. })
    ));
    Ok(())
}

fn list_files(root: &std::path::Path) -> Vec<String> {
    let mut files: Vec<String> = walk(root)
        .into_iter()
        .map(|p| p.strip_prefix(root).unwrap_or(&p).display().to_string())
        .collect();
    files.sort();
    files
}

fn walk(dir: &std::path::Path) -> Vec<std::path::PathBuf> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
        let path = entry.path();
        if path.is_dir() {
            found.extend(walk(&path));
        } else {
            found.push(path);
        }
    }
    found
}
