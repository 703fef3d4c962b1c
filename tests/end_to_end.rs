//! End-to-end tests: a real service on a free port with a fresh database, real
//! gateways with real outbox files, HTTP in between.
//!
//! The service database is a fresh SQLite file per test, or, with
//! `METERVEIL_TEST_BACKEND=postgres`, a fresh PostgreSQL database per test on the
//! server named by `METERVEIL_TEST_POSTGRES` (the README test command starts one
//! and runs this whole file once per backend).

use std::collections::HashSet;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use axum::body::Bytes;
use axum::extract::State;
use axum::http::{HeaderMap, Method, StatusCode, Uri};
use axum::response::IntoResponse;
use meterveil_gateway::client::ServiceClient;
use meterveil_gateway::gateway::{Gateway, GatewayIdentity};
use meterveil_gateway::simulate::{self, SimulateOptions};
use meterveil_gateway::source::RawReading;
use meterveil_gateway::uploader::UploadConfig;
use meterveil_service::app::{self, RunningService};
use meterveil_service::config::{Secret, ServiceConfig};
use meterveil_shared::{FeederId, GatewayId, MeterId};
use serde_json::{json, Value};

const TOKEN: &str = "test-operator-token-0123456789";

#[path = "end_to_end/settlement_runs.rs"]
mod settlement_runs;

struct TestService {
    svc: RunningService,
    /// The database's URL, for more processes on it.
    db: String,
    _dir: tempfile::TempDir,
    http: reqwest::Client,
    /// The key of gateway gw-1 once `small_feeder` provisioned it, and its next sequence number.
    gw_key: std::sync::Mutex<Vec<u8>>,
    seq: AtomicU64,
}

impl TestService {
    fn url(&self) -> String {
        self.svc.url()
    }

    async fn count(&self, sql: &str) -> i64 {
        sqlx::query_scalar(sql).fetch_one(self.svc.store.pool()).await.expect("count query")
    }

    /// Provisions `gateway` on `feeder`; returns its secret.
    async fn provision(&self, gateway: &str, feeder: &str) -> Vec<u8> {
        let (s, b) = self.post_json("/v1/gateways", &json!({"gateway_id": gateway, "feeder_id": feeder}), true).await;
        assert_eq!(s, StatusCode::CREATED, "{b}");
        hex::decode(b["secret"].as_str().expect("secret")).expect("hex")
    }

    /// Uploads `body` signed as gw-1 with the next sequence number.
    async fn post_batch(&self, body: &Value) -> (StatusCode, Value) {
        let seq = self.seq.fetch_add(1, Ordering::SeqCst) + 1;
        let key = self.gw_key.lock().expect("key").clone();
        self.post_signed(body.to_string().as_bytes(), "gw-1", seq, now_s(), &key).await
    }

    /// Uploads raw `body` with explicit signing fields.
    async fn post_signed(&self, body: &[u8], gateway: &str, seq: u64, ts: i64, key: &[u8]) -> (StatusCode, Value) {
        signed_upload(self.http.clone(), self.url(), body.to_vec(), gateway.to_owned(), seq, ts, key.to_vec()).await
    }

    async fn post_json(&self, path: &str, body: &Value, operator: bool) -> (StatusCode, Value) {
        let mut req = self.http.post(format!("{}{path}", self.url())).json(body);
        if operator {
            req = req.bearer_auth(TOKEN);
        }
        let resp = req.send().await.expect("request");
        let status = StatusCode::from_u16(resp.status().as_u16()).expect("status");
        let body = resp.json::<Value>().await.unwrap_or(Value::Null);
        (status, body)
    }
}

/// Uploads `body` to the service at `url`, signed as `gateway` with `key`; owns
/// its arguments so that many can run at once as spawned tasks.
async fn signed_upload(
    http: reqwest::Client,
    url: String,
    body: Vec<u8>,
    gateway: String,
    seq: u64,
    ts: i64,
    key: Vec<u8>,
) -> (StatusCode, Value) {
    use meterveil_shared::auth::*;
    let text = signing_text("POST", "/v1/ingest/batches", &gateway, seq, ts, &body_sha256(&body));
    let resp = http
        .post(format!("{url}/v1/ingest/batches"))
        .header("content-type", "application/json")
        .header(HEADER_GATEWAY, &gateway)
        .header(HEADER_SEQUENCE, seq.to_string())
        .header(HEADER_TIMESTAMP, ts.to_string())
        .header(HEADER_SIGNATURE, sign(&key, &text))
        .body(body)
        .send()
        .await
        .expect("request");
    let status = StatusCode::from_u16(resp.status().as_u16()).expect("status");
    let retry = resp.headers().get("retry-after").and_then(|v| v.to_str().ok()).map(str::to_owned);
    let mut body = resp.json::<Value>().await.unwrap_or(Value::Null);
    if let Some(r) = retry {
        body["retry_after_header"] = r.into();
    }
    (status, body)
}

async fn spawn_service_with(tweak: impl FnOnce(&mut ServiceConfig)) -> TestService {
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    let mut config = ServiceConfig::local(db.clone(), Secret::new(TOKEN));
    tweak(&mut config);
    let svc = app::start(config).await.expect("service starts");
    TestService { svc, db, _dir: dir, http: reqwest::Client::new(), gw_key: Default::default(), seq: AtomicU64::new(0) }
}

async fn spawn_service() -> TestService {
    spawn_service_with(|_| {}).await
}

/// A fresh, empty service database for one test (see the module comment).
async fn test_database(dir: &std::path::Path) -> String {
    if std::env::var("METERVEIL_TEST_BACKEND").as_deref() != Ok("postgres") {
        return format!("sqlite:{}", dir.join("svc.sqlite").display());
    }
    use sqlx::Connection;
    let admin = std::env::var("METERVEIL_TEST_POSTGRES")
        .expect("METERVEIL_TEST_BACKEND=postgres needs METERVEIL_TEST_POSTGRES, an admin URL of a running server");
    let name = format!("mvt_{:016x}", rand::random::<u64>());
    let mut conn = sqlx::PgConnection::connect(&admin).await.expect("connect to the test PostgreSQL server");
    sqlx::query(&format!("CREATE DATABASE {name}")).execute(&mut conn).await.expect("create test database");
    conn.close().await.expect("close");
    let base = admin.rsplit_once('/').map(|(b, _)| b).expect("admin URL ends with a database name");
    format!("{base}/{name}")
}

fn now_s() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).expect("clock").as_secs() as i64
}

/// A feeder `F1` with meters `m1`, `m2` and one profile (3 levels, registers allowed).
async fn small_feeder(t: &TestService) {
    assert_eq!(
        t.post_json("/v1/feeders", &json!({"feeder_id": "F1", "name": "test"}), true).await.0,
        StatusCode::CREATED
    );
    let (s, _) = t.post_json("/v1/feeders/F1/meters", &json!({"meter_ids": ["m1", "m2"]}), true).await;
    assert_eq!(s, StatusCode::OK);
    let profile = json!({"noise": "gaussian", "scale_kw": 0.3, "boundaries_kw": [1.0, 2.0], "interval_s": 900, "send_registers": true});
    let (s, body) = t.post_json("/v1/feeders/F1/profiles", &profile, true).await;
    assert_eq!(s, StatusCode::CREATED, "{body}");
    *t.gw_key.lock().expect("key") = t.provision("gw-1", "F1").await;
}

/// A reverse proxy that fails some uploads: every `before`-th request is answered
/// 503 without reaching the service; every `after`-th is forwarded (so the service
/// commits it) and its acknowledgement is then lost (502).
struct FlakyProxy {
    target: String,
    before: u64,
    after: u64,
    seen: AtomicU64,
    lost_acks: AtomicU64,
    http: reqwest::Client,
}

async fn proxy_handler(
    State(p): State<Arc<FlakyProxy>>,
    method: Method,
    uri: Uri,
    headers: HeaderMap,
    body: Bytes,
) -> axum::response::Response {
    let n = p.seen.fetch_add(1, Ordering::SeqCst) + 1;
    let is_upload = uri.path() == "/v1/ingest/batches";
    if is_upload && n % p.before == 0 {
        return (StatusCode::SERVICE_UNAVAILABLE, "proxy: injected failure").into_response();
    }
    let mut req = p.http.request(
        reqwest::Method::from_bytes(method.as_str().as_bytes()).expect("method"),
        format!("{}{}", p.target, uri),
    );
    for (k, v) in &headers {
        if k != "host" && k != "content-length" {
            req = req.header(k.as_str(), v.as_bytes());
        }
    }
    let resp = match req.body(body).send().await {
        Ok(r) => r,
        Err(e) => return (StatusCode::BAD_GATEWAY, e.to_string()).into_response(),
    };
    let status = StatusCode::from_u16(resp.status().as_u16()).expect("status");
    let bytes = resp.bytes().await.unwrap_or_default();
    if is_upload && n % p.after == 0 && status.is_success() {
        p.lost_acks.fetch_add(1, Ordering::SeqCst);
        return (StatusCode::BAD_GATEWAY, "proxy: acknowledgement lost").into_response();
    }
    (status, [("content-type", "application/json")], bytes).into_response()
}

async fn spawn_proxy(target: String, before: u64, after: u64) -> (String, Arc<FlakyProxy>) {
    let p = Arc::new(FlakyProxy {
        target,
        before,
        after,
        seen: AtomicU64::new(0),
        lost_acks: AtomicU64::new(0),
        http: reqwest::Client::new(),
    });
    let app = axum::Router::new().fallback(proxy_handler).with_state(p.clone());
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
    let addr = listener.local_addr().expect("addr");
    tokio::spawn(async move { axum::serve(listener, app).await });
    (format!("http://{addr}"), p)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_generated_reading_is_stored_exactly_once_through_a_failing_link() {
    let t = spawn_service().await;
    let (proxy_url, proxy) = spawn_proxy(t.url(), 5, 7).await;
    let work = tempfile::tempdir().expect("tempdir");
    let mut opts = SimulateOptions::new(proxy_url, work.path().join("outboxes"));
    opts.operator_token = Some(TOKEN.into());
    opts.meters = 40;
    opts.days = 3;
    opts.meters_per_gateway = 10;
    opts.upload = UploadConfig {
        batch_max: 96,
        backoff: meterveil_gateway::backoff::BackoffPolicy { initial_ms: 5, max_ms: 40 },
        idle_poll_ms: 20,
    };
    let truth = work.path().join("truth.csv");
    opts.truth = Some(truth.clone());
    let report = simulate::run(&opts).await.expect("simulation runs");

    assert_eq!(report.readings_generated, 40 * 3 * 96);
    assert!(report.transient_failures > 0, "the proxy must have caused retries");
    assert!(proxy.lost_acks.load(Ordering::SeqCst) > 0, "some acknowledgements must have been lost");
    assert_eq!(report.refused_batches, 0);
    let stored = t.count("SELECT COUNT(*) FROM readings").await;
    assert_eq!(stored as u64, report.readings_generated, "count equality");
    // Exactly the generated keys: compare with the ground truth's (meter, interval) set.
    let text = std::fs::read_to_string(&truth).expect("truth");
    let want: HashSet<(String, i64)> = text
        .lines()
        .skip(1)
        .map(|l| {
            let c: Vec<&str> = l.split(',').collect();
            (c[0].to_owned(), c[3].parse().expect("interval"))
        })
        .collect();
    let got: Vec<(String, i64)> = sqlx::query_as("SELECT meter_id, interval_start FROM readings")
        .fetch_all(t.svc.store.pool())
        .await
        .expect("keys");
    let got: HashSet<(String, i64)> = got.into_iter().collect();
    assert_eq!(got, want);
    // Lost acknowledgements were answered by replay, not by storing again.
    assert_eq!(t.svc.metrics.readings_duplicate.get(), 0);
    let metrics = t.http.get(format!("{}/metrics", t.url())).send().await.expect("metrics").text().await.expect("text");
    assert!(metrics.contains("meterveil_ingest_batches_total{outcome=\"replayed\"}"), "{metrics}");
    // Register advances: one per whole day (3) per meter on the feeder with daily
    // reads; the weekly and monthly feeders close no period in 3 days.
    let reg = t.count("SELECT COUNT(*) FROM register_advances").await;
    let with_registers = t
        .count("SELECT COUNT(*) FROM meters m JOIN dither_profiles p ON p.feeder_id = m.feeder_id WHERE p.register_period = 'daily'")
        .await;
    assert_eq!(reg, with_registers * 3);
    // Outboxes are empty once everything is acknowledged.
    for entry in std::fs::read_dir(work.path().join("outboxes")).expect("outboxes") {
        let p = entry.expect("entry").path();
        if p.extension().and_then(|e| e.to_str()) == Some("sqlite") {
            let ob = meterveil_gateway::outbox::Outbox::open(&p).await.expect("outbox");
            let c = ob.counts().await.expect("counts");
            assert_eq!((c.pending_levels, c.pending_registers, c.open_batches), (0, 0, 0), "{}", p.display());
        }
    }
}

/// Daily energy from consecutive register reads matches the true loads to 1 Wh.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn register_advances_equal_each_days_energy() {
    let t = spawn_service().await;
    let work = tempfile::tempdir().expect("tempdir");
    let mut opts = SimulateOptions::new(t.url(), work.path().join("outboxes"));
    opts.operator_token = Some(TOKEN.into());
    opts.meters = 8;
    opts.days = 2;
    let truth = work.path().join("truth.csv");
    opts.truth = Some(truth.clone());
    simulate::run(&opts).await.expect("simulation runs");
    let reads: Vec<(String, i64, i64, i64)> =
        sqlx::query_as("SELECT meter_id, period_start, read_at, wh FROM register_advances ORDER BY meter_id, read_at")
            .fetch_all(t.svc.store.pool())
            .await
            .expect("reads");
    assert!(!reads.is_empty());
    let mut day_wh: std::collections::HashMap<(String, i64), f64> = Default::default();
    for l in std::fs::read_to_string(&truth).expect("truth").lines().skip(1) {
        let c: Vec<&str> = l.split(',').collect();
        let at: i64 = c[3].parse().expect("t");
        let kw: f64 = c[4].parse().expect("kw");
        *day_wh.entry((c[0].to_owned(), at - at.rem_euclid(86_400))).or_default() += kw * 250.0;
    }
    let mut checked = 0;
    for (meter, start, end, wh) in &reads {
        assert_eq!(end - start, 86_400, "a daily period");
        let want = day_wh[&(meter.clone(), *start)];
        // Rounded to the Wh; the truth file rounds kW to 6 decimals: 96 · 250 · 5e-7 Wh of slack.
        assert!((*wh as f64 - want).abs() <= 0.5 + 0.02, "{meter} day {start}: {wh} Wh vs {want}");
        checked += 1;
    }
    let daily_meters = t
        .count("SELECT COUNT(*) FROM meters m JOIN dither_profiles p ON p.feeder_id = m.feeder_id WHERE p.register_period = 'daily'")
        .await;
    assert!(daily_meters > 0);
    assert_eq!(checked as i64, daily_meters * 2, "one advance per meter and whole day, on the daily feeder only");
}

fn good_reading(at: i64) -> Value {
    json!({"meter_id": "m1", "interval_start": at, "level": 1, "profile_version": 1})
}

fn aligned_past(intervals_back: i64) -> i64 {
    let now = now_s();
    now - now.rem_euclid(900) - 900 * intervals_back
}

fn batch(id: &str, readings: Vec<Value>) -> Value {
    json!({"batch_id": id, "gateway_id": "gw-1", "feeder_id": "F1", "readings": readings})
}

async fn assert_rejected(t: &TestService, body: &Value, status: StatusCode, field: &str, reason_part: &str) {
    let (s, resp) = t.post_batch(body).await;
    assert_eq!(s, status, "{resp}");
    assert_eq!(resp["field"], field, "{resp}");
    assert!(resp["reason"].as_str().unwrap_or("").contains(reason_part), "{resp}");
    assert!(resp["message"].as_str().unwrap_or("").contains(field), "{resp}");
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 0, "nothing stored");
    assert_eq!(t.count("SELECT COUNT(*) FROM register_advances").await, 0, "no register advance stored");
    assert_eq!(t.count("SELECT COUNT(*) FROM ingest_batches").await, 0, "no batch recorded");
}

#[tokio::test]
async fn bad_batches_are_refused_with_the_field_and_reason_and_store_nothing() {
    let t = spawn_service_with(|c| c.body_limit_bytes = 64 * 1024).await;
    small_feeder(&t).await;
    let ok = aligned_past(4);
    let cases: Vec<(Value, StatusCode, &str, &str)> = vec![
        (
            json!({"batch_id": "b", "gateway_id": "gw-1", "feeder_id": "F1", "readings": [{"meter_id": "m1", "interval_start": "soon", "level": 1, "profile_version": 1}]}),
            StatusCode::BAD_REQUEST,
            "readings[0].interval_start",
            "invalid type",
        ),
        (
            json!({"batch_id": "b", "gateway_id": "gw-1", "feeder_id": "F1", "readings": [], "extra": 1}),
            StatusCode::BAD_REQUEST,
            "extra",
            "unknown field",
        ),
        (
            json!({"batch_id": "b", "gateway_id": "gw-1", "feeder_id": "F9", "readings": [good_reading(ok)]}),
            StatusCode::FORBIDDEN,
            "feeder_id",
            "serves feeder F1, not F9",
        ),
        (
            batch(
                "b",
                vec![
                    good_reading(ok),
                    json!({"meter_id": "m7", "interval_start": ok, "level": 0, "profile_version": 1}),
                ],
            ),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1].meter_id",
            "not registered on feeder F1",
        ),
        (
            batch(
                "b",
                vec![
                    good_reading(ok),
                    json!({"meter_id": "m2", "interval_start": ok, "level": 3, "profile_version": 1}),
                ],
            ),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1].level",
            "out of range",
        ),
        (
            batch(
                "b",
                vec![
                    good_reading(ok),
                    json!({"meter_id": "m2", "interval_start": ok, "level": 0, "profile_version": 4}),
                ],
            ),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1].profile_version",
            "no profile version 4",
        ),
        (
            batch(
                "b",
                vec![
                    good_reading(ok),
                    json!({"meter_id": "m2", "interval_start": ok + 60, "level": 0, "profile_version": 1}),
                ],
            ),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1].interval_start",
            "not aligned",
        ),
        (
            batch("b", vec![good_reading(ok), good_reading(ok + 86_400)]),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1].interval_start",
            "in the future",
        ),
        (
            batch("b", vec![good_reading(ok), good_reading(ok)]),
            StatusCode::UNPROCESSABLE_ENTITY,
            "readings[1]",
            "repeats readings[0]",
        ),
        (batch("b", vec![]), StatusCode::UNPROCESSABLE_ENTITY, "readings", "empty"),
        (
            json!({"batch_id": "b", "gateway_id": "gw-1", "feeder_id": "F1", "readings": [good_reading(ok)],
                   "registers": [{"meter_id": "m1", "period_start": ok - ok.rem_euclid(86_400), "read_at": ok - ok.rem_euclid(86_400) - 86_400, "wh": 5000}]}),
            StatusCode::UNPROCESSABLE_ENTITY,
            "registers[0].read_at",
            "runs backwards",
        ),
        (
            json!({"batch_id": "b", "gateway_id": "gw-1", "feeder_id": "F1", "readings": [good_reading(ok)],
                   "registers": [{"meter_id": "m1", "read_at": ok - ok.rem_euclid(86_400), "wh_total": 5000}]}),
            StatusCode::BAD_REQUEST,
            "registers[0].wh_total",
            "unknown field",
        ),
        (
            json!({"batch_id": "b", "gateway_id": "gw 1", "feeder_id": "F1", "readings": [good_reading(ok)]}),
            StatusCode::UNPROCESSABLE_ENTITY,
            "gateway_id",
            "only ASCII",
        ),
        (
            batch("b", (0..2000).map(|i| good_reading(ok - 900 * i)).collect()),
            StatusCode::PAYLOAD_TOO_LARGE,
            "body",
            "limit",
        ),
    ];
    for (body, status, field, reason) in &cases {
        assert_rejected(&t, body, *status, field, reason).await;
    }
    // A profile with an unknown register period is refused by field, and the
    // feeder keeps its profile.
    let bad = json!({"noise": "gaussian", "scale_kw": 0.3, "boundaries_kw": [1.0], "register_period": "hourly"});
    let (st, body) = t.post_json("/v1/feeders/F1/profiles", &bad, true).await;
    assert_eq!((st, body["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("register_period")), "{body}");
    let current: Value =
        t.http.get(format!("{}/v1/feeders/F1/profile", t.url())).send().await.expect("get").json().await.expect("json");
    assert_eq!((current["version"].as_u64(), current["profile"]["register_period"].as_str()), (Some(1), Some("daily")));
    nothing_stored(&t).await;
    let (s, _) = t.post_batch(&batch("b", vec![good_reading(ok)])).await;
    assert_eq!(s, StatusCode::OK, "a good batch is still accepted afterwards");
    let m = t.http.get(format!("{}/metrics", t.url())).send().await.expect("metrics").text().await.expect("text");
    assert!(m.contains(&format!("meterveil_ingest_batches_total{{outcome=\"rejected\"}} {}", cases.len())), "{m}");
}

#[tokio::test]
async fn stale_profile_versions_are_refused() {
    // No grace after a new version, and a clock tolerance wide enough to send a
    // reading that starts after the new version was published.
    let t = spawn_service_with(|c| {
        c.stale_grace_s = 0;
        c.clock_tolerance_s = 3600;
    })
    .await;
    small_feeder(&t).await;
    let v2 = json!({"noise": "logistic", "scale_kw": 0.4, "boundaries_kw": [1.0, 2.0, 3.0]});
    assert_eq!(t.post_json("/v1/feeders/F1/profiles", &v2, true).await.0, StatusCode::CREATED);
    let next = now_s() - now_s().rem_euclid(900) + 900;
    let body = batch("b", vec![json!({"meter_id": "m1", "interval_start": next, "level": 1, "profile_version": 1})]);
    assert_rejected(&t, &body, StatusCode::UNPROCESSABLE_ENTITY, "readings[0].profile_version", "stale").await;
    // Before the new version was published, version 1 is still fine; level 3 exists only in v2.
    let body = batch(
        "b2",
        vec![
            good_reading(aligned_past(2)),
            json!({"meter_id": "m2", "interval_start": next, "level": 3, "profile_version": 2}),
        ],
    );
    assert_eq!(t.post_batch(&body).await.0, StatusCode::OK);
}

#[tokio::test]
async fn batches_are_idempotent_and_used_profiles_immutable() {
    let t = spawn_service().await;
    small_feeder(&t).await;
    let b = batch("batch-1", vec![good_reading(aligned_past(3)), good_reading(aligned_past(2))]);
    let (s, first) = t.post_batch(&b).await;
    assert_eq!(s, StatusCode::OK);
    assert_eq!(first["stored_readings"], 2);
    let (s, again) = t.post_batch(&b).await;
    assert_eq!((s, &again), (StatusCode::OK, &first), "a replay gets the same acknowledgement");
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 2);
    // Same batch id, different body.
    let other = batch("batch-1", vec![good_reading(aligned_past(5))]);
    let (s, body) = t.post_batch(&other).await;
    assert_eq!(s, StatusCode::CONFLICT, "{body}");
    assert_eq!(body["field"], "batch_id");
    // A new batch repeating a stored (meter, interval) stores it once.
    let (s, ack) = t.post_batch(&batch("batch-2", vec![good_reading(aligned_past(2))])).await;
    assert_eq!(s, StatusCode::OK);
    assert_eq!((ack["stored_readings"].as_u64(), ack["duplicate_readings"].as_u64()), (Some(0), Some(1)));
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 2);

    let profile = json!({"noise": "gaussian", "scale_kw": 0.5, "boundaries_kw": [1.0, 2.0]});
    let put = |v: &str| {
        t.http.put(format!("{}/v1/feeders/F1/profiles/{v}", t.url())).bearer_auth(TOKEN).json(&profile).send()
    };
    let r = put("1").await.expect("put");
    assert_eq!(r.status().as_u16(), 409, "version 1 has been used");
    assert!(r.text().await.expect("text").contains("immutable"));
    assert_eq!(t.post_json("/v1/feeders/F1/profiles", &profile, true).await.0, StatusCode::CREATED);
    assert_eq!(put("2").await.expect("put").status().as_u16(), 200, "unused version 2 may be replaced");
    // Operator endpoints need the token.
    let (s, body) = t.post_json("/v1/feeders/F1/profiles", &profile, false).await;
    assert_eq!(s, StatusCode::UNAUTHORIZED);
    assert_eq!(body["field"], "authorization");
    let bad = json!({"noise": "gaussian", "scale_kw": -1.0, "boundaries_kw": [1.0]});
    let (s, body) = t.post_json("/v1/feeders/F1/profiles", &bad, true).await;
    assert_eq!((s, body["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("scale_kw")));
    let current: Value =
        t.http.get(format!("{}/v1/feeders/F1/profile", t.url())).send().await.expect("get").json().await.expect("json");
    assert_eq!(current["version"], 2);
    assert_eq!(current["profile"]["scale_kw"], 0.5);
}

/// Allowed columns of each schema whose names mention a unit. Anything else with
/// a unit name, and any REAL column but the profile's own scale, fails.
/// (`wh` is a completed register period's advance; no running total may exist.)
/// (`daily_energy_error_max` is an operator's target, a fraction.)
const UNIT_COLUMNS: [&str; 7] =
    ["scale_kw", "boundaries_kw", "wh", "estimate_kw", "band_low_kw", "band_high_kw", "daily_energy_error_max"];

/// REAL columns that hold configuration or the population model's estimates, never a reading.
const REAL_COLUMNS: [(&str, &str); 9] = [
    ("dither_profiles", "scale_kw"),
    ("feeder_targets", "event_f1_max"),
    ("feeder_targets", "daily_energy_error_max"),
    ("recovery_jobs", "progress"),
    ("analysis_jobs", "progress"),
    ("cluster_assignments", "confidence"),
    ("recovered_intervals", "estimate_kw"),
    ("recovered_intervals", "band_low_kw"),
    ("recovered_intervals", "band_high_kw"),
];

fn check_columns(cols: &[(String, String, String)]) {
    for (table, name, ty) in cols {
        let unitish = ["kw", "wh", "watt", "power", "energy", "reading_value", "raw"]
            .iter()
            .any(|u| name.to_lowercase().contains(u));
        if unitish {
            assert!(UNIT_COLUMNS.contains(&name.as_str()), "{table}.{name} could hold a raw reading");
        }
        if ty.to_uppercase().contains("REAL")
            || ty.to_uppercase().contains("FLOA")
            || ty.to_uppercase().contains("DOUB")
        {
            assert!(REAL_COLUMNS.contains(&(table.as_str(), name.as_str())), "{table}.{name} is a {ty} column");
        }
    }
}

async fn columns(pool: &sqlx::SqlitePool) -> Vec<(String, String, String)> {
    let tables: Vec<String> = sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%' AND name NOT LIKE '_sqlx%'",
    )
    .fetch_all(pool)
    .await
    .expect("tables");
    let mut out = Vec::new();
    for t in tables {
        let rows: Vec<(String, String)> = sqlx::query_as(&format!("SELECT name, type FROM pragma_table_info('{t}')"))
            .fetch_all(pool)
            .await
            .expect("cols");
        out.extend(rows.into_iter().map(|(n, ty)| (t.clone(), n, ty)));
    }
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn no_raw_reading_is_stored_in_the_outbox_or_the_service() {
    let t = spawn_service().await;
    small_feeder(&t).await;
    let dir = tempfile::tempdir().expect("tempdir");
    let outbox_path = dir.path().join("gw.sqlite");
    let key = meterveil_gateway::gateway::GatewayKey::from_hex(&hex::encode(t.gw_key.lock().expect("key").clone()))
        .expect("key");
    let identity = GatewayIdentity {
        gateway_id: GatewayId::parse("gw-1").expect("id"),
        feeder_id: FeederId::parse("F1").expect("id"),
        key,
    };
    let client = ServiceClient::new(&t.url(), std::time::Duration::from_secs(5)).expect("client");
    let mut gw = Gateway::open(identity, &outbox_path, client).await.expect("gateway");
    gw.pull_profile().await.expect("profile");
    // Distinctive raw values, so their bytes could be found if they were written.
    let start = aligned_past(200);
    let raw: Vec<RawReading> = (0..192)
        .map(|i| RawReading {
            meter_id: MeterId::parse(if i % 2 == 0 { "m1" } else { "m2" }).expect("id"),
            interval_start: start + 900 * (i / 2),
            kw: 1.234_567_891_2 + i as f64 * 0.010_203_04,
        })
        .collect();
    gw.accept(&raw, None).await.expect("accept");

    // Before upload: the outbox holds levels 0..=2 only, and none of the raw values.
    let levels: Vec<i64> =
        sqlx::query_scalar("SELECT level FROM pending_levels").fetch_all(gw.outbox().pool()).await.expect("levels");
    assert_eq!(levels.len(), 192);
    assert!(levels.iter().all(|l| (0..=2).contains(l)));
    check_columns(&columns(gw.outbox().pool()).await);
    let mut bytes = Vec::new();
    for suffix in ["", "-wal"] {
        if let Ok(b) = std::fs::read(format!("{}{suffix}", outbox_path.display())) {
            bytes.extend(b);
        }
    }
    for r in &raw {
        let be = r.kw.to_be_bytes();
        assert!(!bytes.windows(8).any(|w| w == be), "raw value {} found in the outbox file", r.kw);
        let text = format!("{:.6}", r.kw);
        assert!(!bytes.windows(text.len()).any(|w| w == text.as_bytes()), "raw value {text} found as text");
    }

    let (_tx, stop) = tokio::sync::watch::channel(false);
    let (_done_tx, done) = tokio::sync::watch::channel(true);
    gw.uploader(UploadConfig::default()).run(done, stop).await.expect("upload");
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 192);
    assert_eq!(t.count("SELECT COUNT(*) FROM readings WHERE level NOT BETWEEN 0 AND 2").await, 0);
    check_columns(&t.svc.store.schema_columns().await.expect("schema"));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn gateway_run_reads_a_file_once_and_reports_bad_lines() {
    let t = spawn_service().await;
    small_feeder(&t).await;
    let dir = tempfile::tempdir().expect("tempdir");
    let day = aligned_past(300) - (aligned_past(300)).rem_euclid(86_400);
    let mut csv = String::from("meter_id,interval_start,wh\n");
    for i in 0..96 {
        csv.push_str(&format!("m1,{},{}\n", day + 900 * i, 100 + i));
        csv.push_str(&format!("m2,{},{}\n", day + 900 * i, 300));
    }
    csv.push_str("m1,notanumber,5\nm3 bad,1700000000,1\nm2,1700000000,-4\n");
    let input = dir.path().join("export.csv");
    std::fs::write(&input, &csv).expect("write");
    let config_text = format!(
        "gateway_id = \"gw-1\"\nfeeder_id = \"F1\"\nsecret = \"{}\"\nservice_url = \"{}\"\noutbox = \"{}\"\n[source]\nkind = \"file\"\npath = \"{}\"\n[upload]\nbatch_max = 96\n",
        hex::encode(t.gw_key.lock().expect("key").clone()),
        t.url(),
        dir.path().join("outbox.sqlite").display(),
        input.display()
    );
    let config = meterveil_gateway::config::GatewayConfig::parse(&config_text).expect("config");
    let (_tx, rx) = tokio::sync::watch::channel(false);
    let report = meterveil_gateway::run::run(config.clone(), rx.clone()).await.expect("run");
    assert_eq!(report.lines_rejected, 3);
    assert_eq!(report.levels_queued, 192);
    assert_eq!(report.upload.readings_acknowledged, 192);
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 192);
    // One advance per meter for the whole day: m1's day is 96·100 + Σi = 14160 Wh.
    let reads: Vec<(String, i64)> =
        sqlx::query_as("SELECT meter_id, wh FROM register_advances ORDER BY meter_id, read_at")
            .fetch_all(t.svc.store.pool())
            .await
            .expect("reads");
    assert_eq!(reads.iter().map(|r| r.1).collect::<Vec<_>>(), vec![14_160, 96 * 300]);
    // A second run resumes at the saved position: nothing is dithered or sent again.
    let again = meterveil_gateway::run::run(config, rx).await.expect("second run");
    assert_eq!((again.levels_queued, again.lines_rejected, again.upload.batches), (0, 0, 0));
}

/// `utility-service recover` on files made from the simulated town: every meter
/// and interval comes back, with flags, bands inside [0, alpha], register days
/// summing to their energy, and bad input named by file, line and field.
/// Writes profile.json, levels.csv (5% missing) and reg.csv (the first three
/// days) for `meters` households of the demo town over `days` days; returns the
/// number of level rows.
fn write_town_files(dir: &std::path::Path, meters: usize, days: i64) -> usize {
    use meterveil_gateway::simulate::Town;
    use meterveil_shared::mechanism::dither_and_quantize;
    use rand::{Rng, SeedableRng};

    let town = Town::new(meters, days as u32, 1_700_006_400, 5);
    let profile = r#"{"noise":"gaussian","scale_kw":0.3,"boundaries_kw":[1.0,2.0],"interval_s":900}"#;
    let p = meterveil_shared::DitherProfile::from_json(profile).expect("profile");
    std::fs::write(dir.join("profile.json"), profile).expect("write");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(8);
    let mut levels = String::from("meter_id,interval_start,level\n");
    let mut regs = String::from("meter_id,day_start,wh\n");
    let mut rows = 0;
    for h in &town.households {
        for d in 0..days {
            let day = town.start_day + d * 86_400;
            let load = town.day_load(h, d as u32);
            for (i, kw) in load.iter().enumerate() {
                let l = dither_and_quantize(&p, *kw, &mut rng);
                if !rng.random_bool(0.05) {
                    levels.push_str(&format!("{},{},{l}\n", h.meter_id, day + 900 * i as i64));
                    rows += 1;
                }
            }
            if d < 3 {
                regs.push_str(&format!("{},{day},{}\n", h.meter_id, (load.iter().sum::<f64>() * 250.0).floor()));
            }
        }
    }
    std::fs::write(dir.join("levels.csv"), &levels).expect("write");
    std::fs::write(dir.join("reg.csv"), &regs).expect("write");
    rows
}

#[test]
fn recover_command_on_files() {
    let dir = tempfile::tempdir().expect("tempdir");
    let rows = write_town_files(dir.path(), 60, 7);
    let out = dir.path().join("out.csv");
    let bin = env!("CARGO_BIN_EXE_utility-service");
    let run = std::process::Command::new(bin)
        .args(["recover", "--levels"])
        .arg(dir.path().join("levels.csv"))
        .arg("--profile")
        .arg(dir.path().join("profile.json"))
        .arg("--output")
        .arg(&out)
        .arg("--registers")
        .arg(dir.path().join("reg.csv"))
        .args(["--rank", "auto", "--alpha-kw", "15"])
        .output()
        .expect("run recover");
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let summary = last_json_line(&run.stdout);
    assert_eq!(summary["meters"], 60);
    assert_eq!(summary["intervals"], 7 * 96);
    assert_eq!(summary["readings"], rows);
    assert_eq!(summary["register_days"], 180);
    let text = std::fs::read_to_string(&out).expect("out");
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("meter_id,interval_start,kw,flag,kw_low,kw_high"));
    let body: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert_eq!(body.len(), 60 * 7 * 96);
    let mut day_sum: std::collections::HashMap<(String, i64), f64> = Default::default();
    for r in &body {
        let (kw, lo, hi): (f64, f64, f64) =
            (r[2].parse().expect("kw"), r[4].parse().expect("lo"), r[5].parse().expect("hi"));
        assert!(["derived", "estimated", "corrected", "atypical"].contains(&r[3]), "{r:?}");
        assert!(0.0 <= lo && lo <= kw + 1e-4 && kw <= hi + 1e-4 && hi <= 15.0, "{r:?}");
        let t: i64 = r[1].parse().expect("t");
        *day_sum.entry((r[0].to_owned(), t - t.rem_euclid(86_400))).or_default() += kw * 250.0;
    }
    let regs = std::fs::read_to_string(dir.path().join("reg.csv")).expect("reg");
    for l in regs.lines().skip(1) {
        let c: Vec<&str> = l.split(',').collect();
        let want: f64 = c[2].parse().expect("wh");
        let got = day_sum[&(c[0].to_owned(), c[1].parse().expect("day"))];
        // The output rounds kW to 4 decimals: 96 · 250 · 5e-5 = 1.2 Wh of slack at most.
        assert!((got - want).abs() <= 1.0 + 1.2, "{l}: {got}");
    }

    aggregate_command_on_files(dir.path(), &out);

    // Clustering the recovered profiles: every meter gets a cluster and a confidence.
    let clusters = dir.path().join("clusters.csv");
    let run = std::process::Command::new(bin)
        .args(["cluster", "--profiles"])
        .arg(&out)
        .arg("--output")
        .arg(&clusters)
        .args(["--clusters", "4"])
        .output()
        .expect("run cluster");
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let summary = last_json_line(&run.stdout);
    assert_eq!((summary["clusters"].as_u64(), summary["chosen_by"].as_str()), (Some(4), Some("operator")));
    assert_eq!(summary["representatives"][0]["weekday_kw"].as_array().map(Vec::len), Some(96));
    let text = std::fs::read_to_string(&clusters).expect("clusters");
    assert_eq!(text.lines().next(), Some("meter_id,cluster,confidence,status"));
    let labels: HashSet<&str> = text.lines().skip(1).map(|l| l.split(',').nth(1).expect("cluster")).collect();
    assert_eq!(text.lines().count(), 61);
    assert_eq!(labels.len(), 4);
    assert!(text.lines().skip(1).all(|l| l.ends_with(",assigned") || l.ends_with(",unassigned")), "{text}");
    assert!(summary["input"].as_str().is_some_and(|n| n.contains("--levels")), "{summary}");

    // Clustering from the levels: a fit at the clustering rank first, the count by the stability rule.
    let run = std::process::Command::new(bin)
        .args(["cluster", "--levels"])
        .arg(dir.path().join("levels.csv"))
        .arg("--profile")
        .arg(dir.path().join("profile.json"))
        .arg("--output")
        .arg(&clusters)
        .output()
        .expect("run cluster");
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let summary = last_json_line(&run.stdout);
    assert_eq!(summary["chosen_by"].as_str(), Some("stability"), "{summary}");
    let k = summary["clusters"].as_u64().expect("clusters") as usize;
    assert_eq!(summary["coherence"].as_array().map(Vec::len), Some(k), "{summary}");
    // Both solvers say how they stopped: the fit and the (dense) eigensolver.
    assert!(summary["input"].as_str().is_some_and(|n| n.contains("iterations, stopped: ")), "{summary}");
    assert_eq!(summary["eigen"]["stop"].as_str(), Some("direct"), "{summary}");
    assert_eq!(std::fs::read_to_string(&clusters).expect("clusters").lines().count(), 61);
    // One input or the other, and a clear error without either.
    let run = std::process::Command::new(bin).args(["cluster", "--output"]).arg(&clusters).output().expect("run");
    assert!(!run.status.success());
    assert!(String::from_utf8_lossy(&run.stderr).contains("--profiles"), "{}", String::from_utf8_lossy(&run.stderr));

    // Bad input: the file, the line and the field are named; nothing is written.
    let bad = dir.path().join("bad.csv");
    std::fs::write(&bad, "meter_id,interval_start,level\nm1,1700006400,1\nm1,1700007300,7\n").expect("write");
    let out2 = dir.path().join("out2.csv");
    let run = std::process::Command::new(bin)
        .args(["recover", "--levels"])
        .arg(&bad)
        .arg("--profile")
        .arg(dir.path().join("profile.json"))
        .arg("--output")
        .arg(&out2)
        .output()
        .expect("run");
    assert!(!run.status.success());
    let err = String::from_utf8_lossy(&run.stderr);
    assert!(err.contains("bad.csv line 3") && err.contains("level") && err.contains("out of range"), "{err}");
    assert!(!out2.exists());
    let run = std::process::Command::new(bin)
        .args(["recover", "--levels"])
        .arg(dir.path().join("levels.csv"))
        .arg("--profile")
        .arg(dir.path().join("profile.json"))
        .arg("--output")
        .arg(&out2)
        .args(["--rank", "many"])
        .output()
        .expect("run");
    assert!(String::from_utf8_lossy(&run.stderr).contains("--rank"), "{}", String::from_utf8_lossy(&run.stderr));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn recovery_job_over_stored_levels() {
    let t = spawn_service().await;
    let work = tempfile::tempdir().expect("tempdir");
    let mut opts = SimulateOptions::new(t.url(), work.path().join("outboxes"));
    opts.operator_token = Some(TOKEN.into());
    opts.meters = 48;
    opts.days = 4;
    let report = simulate::run(&opts).await.expect("simulation");
    let from = report.first_day;
    let to = from + 4 * 86_400;
    let (s, body) = t
        .post_json("/v1/recoveries", &json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "rank": 5}), true)
        .await;
    assert_eq!(s, StatusCode::ACCEPTED, "{body}");
    let id = body["job_id"].as_str().expect("id").to_owned();
    let get = |path: String| t.http.get(format!("{}{path}", t.url())).bearer_auth(TOKEN).send();
    let mut job = Value::Null;
    for _ in 0..600 {
        job = get(format!("/v1/recoveries/{id}")).await.expect("status").json().await.expect("json");
        if job["state"] == "done" || job["state"] == "failed" {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    assert_eq!(job["state"], "done", "{job}");
    assert_eq!(job["diagnostics"]["meters"], 12);
    assert_eq!(job["diagnostics"]["intervals"], 4 * 96);
    let rows: Vec<Value> =
        get(format!("/v1/recoveries/{id}/intervals")).await.expect("rows").json().await.expect("json");
    assert_eq!(rows.len(), 12 * 4 * 96);
    // Each meter-day with register reads at both midnights sums to their difference.
    let reads: Vec<(String, i64, i64)> =
        sqlx::query_as("SELECT meter_id, period_start, wh FROM register_advances ORDER BY meter_id, read_at")
            .fetch_all(t.svc.store.pool())
            .await
            .expect("reads");
    let mut sums: std::collections::HashMap<(String, i64), f64> = Default::default();
    for r in &rows {
        let at = r["interval_start"].as_i64().expect("t");
        *sums.entry((r["meter_id"].as_str().expect("m").to_owned(), at - at.rem_euclid(86_400))).or_default() +=
            r["kw"].as_f64().expect("kw") * 250.0;
    }
    let mut checked = 0;
    for (meter, day, wh) in &reads {
        if let Some(got) = sums.get(&(meter.clone(), *day)) {
            assert!((got - *wh as f64).abs() <= 1.0, "{meter} day {day}: {got} vs {wh}");
            checked += 1;
        }
    }
    assert_eq!(checked, 12 * 4);
    assert_eq!(job["diagnostics"]["register_days"], 12 * 4);
    let csv = get(format!("/v1/recoveries/{id}/intervals?format=csv&meter_id=QM-CHAPEL-ROW-0001"))
        .await
        .expect("csv")
        .text()
        .await
        .expect("text");
    assert_eq!(csv.lines().count(), 1 + 4 * 96);

    // Settlement: every meter-day with a daily register advance settles at it.
    let days: Vec<Value> = get(format!("/v1/recoveries/{id}/daily")).await.expect("daily").json().await.expect("json");
    let advances: std::collections::HashMap<(String, i64), i64> =
        reads.iter().map(|(m, day, wh)| ((m.clone(), *day), *wh)).collect();
    let mut settled = 0;
    for d in &days {
        let key = (d["meter_id"].as_str().expect("m").to_owned(), d["day_start"].as_i64().expect("day"));
        if let Some(adv) = advances.get(&key) {
            assert_eq!(d["energy_wh"].as_f64(), Some(*adv as f64), "{d}");
            assert_eq!(d["source"], "register");
            assert_eq!((d["low_wh"].as_f64(), d["high_wh"].as_f64()), (Some(*adv as f64), Some(*adv as f64)), "{d}");
            settled += 1;
        }
    }
    assert_eq!((days.len(), settled), (12 * 4, 12 * 4));
    group_loads_over_http(&t, &id, &rows, (from, to)).await;
    // A band-energy target needs the feeder's tariff calendar, and none is stored yet.
    let (st, b) = t
        .post_json(
            "/v1/calibrations",
            &json!({"recovery_job": id, "event_f1_max": 0.9, "daily_energy_error_max": 0.5, "band_energy_error_max": 0.2}),
            true,
        )
        .await;
    assert_eq!((st, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("band_energy_error_max")), "{b}");
    band_energies_over_http(&t, &id, &reads).await;
    rolling_recovery_over_http(&t, from).await;
    let local = get(format!("/v1/recoveries/{id}/intervals?format=local-csv&meter_id=QM-CHAPEL-ROW-0001"))
        .await
        .expect("local")
        .text()
        .await
        .expect("text");
    assert!(local.starts_with("meter_id,interval_start,interval_end_local,local_date,wh,"), "{local}");
    assert_eq!(local.lines().count(), 1 + 4 * 96);

    // The ESPI export validates against the published schema; a broken copy does not.
    let xml = get(format!("/v1/recoveries/{id}/intervals?format=espi")).await.expect("espi").text().await.expect("t");
    let work = tempfile::tempdir().expect("tempdir");
    let good = work.path().join("good.xml");
    std::fs::write(&good, &xml).expect("write");
    let bad = work.path().join("bad.xml");
    std::fs::write(
        &bad,
        xml.replacen("<espi:value>", "<espi:valeur>", 1).replacen("</espi:value>", "</espi:valeur>", 1),
    )
    .expect("write");
    let validate = validate_espi;
    let v = validate(&good);
    eprintln!("ESPI export: xmlschema {}, schema version {}: {v}", v["xmlschema"], v["schema_version"]);
    assert_eq!(v["valid"], true, "{v}");
    assert_eq!(v["schema_version"], "4.0.20231213");
    assert_eq!(validate(&bad)["valid"], false);
    assert_eq!(xml.matches("<espi:IntervalReading>").count(), 12 * 4 * 96);
    // Bad requests name their field.
    let (s, body) =
        t.post_json("/v1/recoveries", &json!({"feeder_id": "QM-CHAPEL-ROW", "from": to, "to": from}), true).await;
    assert_eq!((s, body["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("to")));
    let (s, body) = t
        .post_json(
            "/v1/recoveries",
            &json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "rank": "lots"}),
            true,
        )
        .await;
    assert_eq!((s, body["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("rank")));
    // A service limit whose likelihood table would not fit in bounded memory.
    let (s, body) = t
        .post_json(
            "/v1/recoveries",
            &json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "alpha_kw": 10000}),
            true,
        )
        .await;
    assert_eq!((s, body["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("alpha_kw")), "{body}");
    assert!(body["reason"].as_str().is_some_and(|r| r.contains("MiB")), "{body}");
    let r = get("/v1/recoveries/rec-none".into()).await.expect("get");
    assert_eq!(r.status().as_u16(), 404);

    // Clustering job over the recovered profiles, results stored with the job.
    let (s, body) = t.post_json("/v1/clusterings", &json!({"recovery_jobs": [id], "clusters": 3}), true).await;
    assert_eq!(s, StatusCode::ACCEPTED, "{body}");
    let cid = body["job_id"].as_str().expect("id").to_owned();
    for _ in 0..600 {
        job = get(format!("/v1/analyses/{cid}")).await.expect("status").json().await.expect("json");
        if job["state"] == "done" || job["state"] == "failed" {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    assert_eq!(job["state"], "done", "{job}");
    assert_eq!((job["kind"].as_str(), job["result"]["clusters"].as_u64()), (Some("cluster"), Some(3)));
    let reps = job["result"]["representatives"].as_array().expect("representatives");
    assert_eq!(reps.iter().map(|r| r["size"].as_u64().unwrap_or(0)).sum::<u64>(), 12);
    assert!(reps.iter().all(|r| r["weekday_kw"].as_array().is_some_and(|v| v.len() == 96)));
    let rows: Vec<Value> =
        get(format!("/v1/clusterings/{cid}/assignments")).await.expect("rows").json().await.expect("json");
    assert_eq!(rows.len(), 12);
    assert!(rows.iter().all(|r| r["feeder_id"] == "QM-CHAPEL-ROW" && (0..3).contains(&r["cluster"].as_i64().unwrap())));
    let csv = get(format!("/v1/clusterings/{cid}/assignments?format=csv")).await.expect("csv").text().await.expect("t");
    assert!(csv.starts_with("meter_id,cluster,confidence,status\n") && csv.lines().count() == 13, "{csv}");
    assert_eq!(job["result"]["clustering_rank"].as_u64(), Some(30), "{job}");
    assert_eq!(job["result"]["coherence"].as_array().map(Vec::len), Some(3), "{job}");
    let stored = t.count(&format!("SELECT COUNT(*) FROM cluster_assignments WHERE job_id = '{cid}'")).await;
    assert_eq!(stored, 12);
    // "The meters of cluster k" as a group: its members now, by name.
    let put = |body: Value| {
        let req = t.http.put(format!("{}/v1/groups/cluster-one", t.url())).bearer_auth(TOKEN).json(&body);
        async move {
            let r = req.send().await.expect("put");
            (r.status(), r.json::<Value>().await.expect("json"))
        }
    };
    let (st, b) = put(json!({"clustering_job": cid, "cluster": 1})).await;
    let want: Vec<&str> =
        rows.iter().filter(|r| r["cluster"] == 1).map(|r| r["meter_id"].as_str().expect("m")).collect();
    assert_eq!((st, b["meters"].as_u64()), (StatusCode::OK, Some(want.len() as u64)), "{b}");
    let g: Value = get("/v1/groups/cluster-one".into()).await.expect("group").json().await.expect("json");
    assert_eq!(g["meters"], json!(want), "{g}");
    for (body, field) in [
        (json!({"clustering_job": cid, "cluster": 7}), "cluster"),
        (json!({"clustering_job": id, "cluster": 0}), "clustering_job"),
        (json!({"clustering_job": cid}), "meters"),
        (json!({"clustering_job": cid, "cluster": 0, "meters": ["QM-CHAPEL-ROW-0001"]}), "meters"),
    ] {
        let (st, b) = put(body).await;
        assert_eq!((st, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some(field)), "{b}");
    }
    let g: Value = get("/v1/groups/cluster-one".into()).await.expect("group").json().await.expect("json");
    assert_eq!(g["meters"], json!(want), "a refused definition changed nothing");
    for (body, field) in [
        (json!({"recovery_jobs": [id], "clusters": 1}), "clusters"),
        (json!({"recovery_jobs": ["rec-none"]}), "recovery_jobs"),
        (json!({"recovery_jobs": []}), "recovery_jobs"),
    ] {
        let (s, b) = t.post_json("/v1/clusterings", &body, true).await;
        assert_eq!((s, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some(field)), "{b}");
    }
    let (s, _) = t.post_json("/v1/clusterings", &json!({"recovery_jobs": [id]}), false).await;
    assert_eq!(s, StatusCode::UNAUTHORIZED);
    let before = t.count("SELECT COUNT(*) FROM analysis_jobs").await;
    assert_eq!(before, 1, "rejected requests made no job");

    // Privacy audit of one captured meter over the recovery, and its report.
    let wait = |id: String| {
        let get = &get;
        async move {
            let mut job = Value::Null;
            for _ in 0..1200 {
                job = get(format!("/v1/analyses/{id}")).await.expect("status").json().await.expect("json");
                if job["state"] == "done" || job["state"] == "failed" {
                    break;
                }
                tokio::time::sleep(std::time::Duration::from_millis(100)).await;
            }
            job
        }
    };
    let (s, body) =
        t.post_json("/v1/audits", &json!({"recovery_job": id, "captured": ["QM-CHAPEL-ROW-0001"]}), true).await;
    assert_eq!(s, StatusCode::ACCEPTED, "{body}");
    let aid = body["job_id"].as_str().expect("id").to_owned();
    let audit = wait(aid.clone()).await;
    assert_eq!(audit["state"], "done", "{audit}");
    let r = &audit["result"];
    assert!(r["strongest"]["event_f1"].is_number() && r["utility"]["nrmse"].is_number(), "{r}");
    assert!(r["mechanism"]["ldp_epsilon"].as_f64().is_some_and(|e| e > 0.0));
    assert!(r["direct"]["strongest"]["nrmse"].is_number());
    let html = get(format!("/v1/analyses/{aid}/report")).await.expect("report").text().await.expect("text");
    assert!(html.contains("<svg") && html.contains("QM-CHAPEL-ROW"), "{}", &html[..html.len().min(400)]);

    // Calibration with loose targets on what the utility uses (daily, group and
    // band energies on the feeder's latest tariff calendar), publishing its
    // recommendation as version 2.
    let body = json!({
        "recovery_job": id, "event_f1_max": 0.9, "daily_energy_error_max": 0.5, "group_nrmse_max": 5.0,
        "group_size": 4, "band_energy_error_max": 0.9, "publish": true
    });
    let (s, body) = t.post_json("/v1/calibrations", &body, true).await;
    assert_eq!(s, StatusCode::ACCEPTED, "{body}");
    let cal = wait(body["job_id"].as_str().expect("id").to_owned()).await;
    assert_eq!(cal["state"], "done", "{cal}");
    let c = &cal["result"];
    assert_eq!(c["meets_targets"], true, "{c}");
    assert_eq!(c["tariff_version"], 2, "the latest calendar");
    let chosen = &c["chosen"];
    assert!(chosen["utility_group_nrmse"].as_f64().is_some_and(|v| v > 0.0 && v < 5.0), "{chosen}");
    assert!(chosen["utility_band_energy_error"].as_f64().is_some_and(|v| (0.0..0.9).contains(&v)), "{chosen}");
    let message = c["message"].as_str().unwrap_or("");
    assert!(message.contains("group-load nRMSE (4 meters)") && message.contains("band-energy error"), "{message}");
    assert_eq!(c["published_version"], 2);
    let current: Value = t
        .http
        .get(format!("{}/v1/feeders/QM-CHAPEL-ROW/profile", t.url()))
        .send()
        .await
        .expect("profile")
        .json()
        .await
        .expect("json");
    assert_eq!(current["version"], 2, "{current}");
    assert_eq!(current["profile"]["scale_kw"], c["recommended"]["scale_kw"], "{current}");

    for (path, body, field) in [
        ("/v1/audits", json!({"recovery_job": id, "captured": ["QM-NOWHERE-0001"]}), "captured"),
        ("/v1/audits", json!({"recovery_job": id, "captured": []}), "captured"),
        ("/v1/audits", json!({"recovery_job": "rec-none", "captured": ["QM-CHAPEL-ROW-0001"]}), "recovery_job"),
        (
            "/v1/calibrations",
            json!({"recovery_job": id, "event_f1_max": 2.0, "daily_energy_error_max": 0.1}),
            "event_f1_max",
        ),
        (
            "/v1/calibrations",
            json!({"recovery_job": id, "event_f1_max": 0.3, "daily_energy_error_max": 0.1, "captured": 5}),
            "captured",
        ),
        (
            "/v1/calibrations",
            json!({"recovery_job": id, "event_f1_max": 0.3, "daily_energy_error_max": 0.1, "group_nrmse_max": 0.1, "group_size": 500}),
            "group_size",
        ),
    ] {
        let (s, b) = t.post_json(path, &body, true).await;
        assert_eq!((s, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some(field)), "{path} {b}");
    }
    assert_eq!(t.count("SELECT COUNT(*) FROM analysis_jobs").await, 3, "rejected requests made no job");
}

/// The `aggregate` command on a recover output: two groups (one meter in
/// both), a band around every group load, and a groups file naming a meter of
/// no profile refused with its line and field, with no output written.
fn aggregate_command_on_files(dir: &std::path::Path, out: &std::path::Path) {
    let meters: Vec<String> = {
        let text = std::fs::read_to_string(out).expect("out");
        let mut m: Vec<String> = text.lines().skip(1).map(|l| l.split(',').next().expect("id").to_owned()).collect();
        m.dedup();
        m
    };
    let run = |groups: &str, agg: &std::path::Path| {
        let file = dir.join("groups.csv");
        std::fs::write(&file, groups).expect("groups");
        std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
            .args(["aggregate", "--profiles"])
            .arg(out)
            .arg("--groups")
            .arg(&file)
            .arg("--output")
            .arg(agg)
            .arg("--levels")
            .arg(dir.join("levels.csv"))
            .arg("--profile")
            .arg(dir.join("profile.json"))
            .output()
            .expect("run aggregate")
    };
    let mut groups = String::from("meter_id,group\n");
    for (i, m) in meters.iter().enumerate() {
        groups += &format!("{m},{}\n", if i < 30 { "transformer north" } else { "transformer south" });
    }
    groups += &format!("{},portfolio\n", meters[0]);
    let agg = dir.join("agg.csv");
    let r = run(&groups, &agg);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    assert_eq!(last_json_line(&r.stdout)["groups"], 3);
    let text = std::fs::read_to_string(&agg).expect("agg");
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("group,interval_start,kw,kw_low,kw_high,meters"));
    let body: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert_eq!(body.len(), 3 * 7 * 96);
    for r in &body {
        let (kw, lo, hi): (f64, f64, f64) =
            (r[2].parse().expect("kw"), r[3].parse().expect("lo"), r[4].parse().expect("hi"));
        assert!(0.0 <= lo && lo <= kw && kw <= hi && hi > lo, "{r:?}");
        let n = match r[0] {
            "portfolio" => 1,
            _ => 30,
        };
        assert_eq!(r[5], n.to_string(), "{r:?}");
    }
    let bad = dir.join("agg-bad.csv");
    for (text, line, field) in [
        (format!("meter_id,group\n{},north\nQM-NOWHERE-0001,north\n", meters[0]), "line 3", "meter_id"),
        (format!("meter_id,group\n{0},north\n{0},north\n", meters[0]), "line 3", "meter_id"),
        (format!("meter_id,group\n{},\n", meters[0]), "line 2", "group"),
    ] {
        let r = run(&text, &bad);
        let err = String::from_utf8_lossy(&r.stderr);
        assert!(!r.status.success() && err.contains(line) && err.contains(field), "{text}: {err}");
        assert!(!bad.exists(), "a refused groups file wrote output");
    }
    energies_on_files(dir, out, &meters, &groups);
}

/// The `aggregate` command's band and daily energies: a two-band calendar,
/// daily energies reconciled exactly to the register reads, bands that hold
/// their estimate, and a calendar with an overlap refused naming its line and
/// field with nothing written.
fn energies_on_files(dir: &std::path::Path, out: &std::path::Path, meters: &[String], groups: &str) {
    let p = |f: &str| dir.join(f);
    std::fs::write(p("groups.csv"), groups).expect("groups");
    let tariff = r#"{
  "name": "Chapel Row two-rate",
  "time_zone": "UTC",
  "billing_day": 1,
  "bands": [
    { "band": "day", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "07:00", "to": "23:00" },
    { "band": "night", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "23:00", "to": "07:00" },
    { "band": "night", "days": ["sat", "sun", "holiday"], "from": "00:00", "to": "24:00" }
  ]
}"#;
    let run = |tariff: &str, suffix: &str| {
        std::fs::write(p("tariff.json"), tariff).expect("tariff");
        std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
            .args(["aggregate", "--profiles"])
            .arg(out)
            .args(["--groups".as_ref(), p("groups.csv").as_os_str()])
            .args(["--output".as_ref(), p(&format!("agg{suffix}.csv")).as_os_str()])
            .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
            .args(["--profile".as_ref(), p("profile.json").as_os_str()])
            .args(["--registers".as_ref(), p("reg.csv").as_os_str()])
            .args(["--tariff".as_ref(), p("tariff.json").as_os_str()])
            .args(["--band-energies".as_ref(), p(&format!("bands{suffix}.csv")).as_os_str()])
            .args(["--daily".as_ref(), p(&format!("daily{suffix}.csv")).as_os_str()])
            .output()
            .expect("run aggregate")
    };
    let r = run(tariff, "-e");
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    // The bands' bootstrap ran (8 refits by default) at the profiles' rank.
    let summary = last_json_line(&r.stdout);
    assert_eq!(summary["bootstrap_draws"], 8, "{summary}");
    assert!(summary["rank"].as_u64().is_some_and(|r| (1..=40).contains(&r)), "{summary}");
    let rows = |f: &str| -> Vec<Vec<String>> {
        let text = std::fs::read_to_string(p(f)).expect("energies");
        text.lines().skip(1).map(|l| l.split(',').map(str::to_owned).collect()).collect()
    };
    let bands = rows("bands-e.csv");
    let daily = rows("daily-e.csv");
    assert!(std::fs::read_to_string(p("bands-e.csv"))
        .expect("b")
        .starts_with("meter_id,period_start,period_end,band,kwh,kwh_low,kwh_high,intervals,register_read\n"));
    assert_eq!(daily.len(), meters.len() * 7, "a row per meter and day");
    let num = |s: &str| -> f64 { s.parse().expect("number") };
    let mut totals: std::collections::HashMap<&str, (f64, f64)> = Default::default();
    for r in &bands {
        assert!(["day", "night"].contains(&r[3].as_str()), "{r:?}");
        assert!(num(&r[5]) <= num(&r[4]) + 1e-4 && num(&r[4]) <= num(&r[6]) + 1e-4, "{r:?}");
        totals.entry(r[0].as_str()).or_default().0 += num(&r[4]);
    }
    for r in &daily {
        assert!(num(&r[3]) <= num(&r[2]) + 1e-4 && num(&r[2]) <= num(&r[4]) + 1e-4, "{r:?}");
        totals.entry(r[0].as_str()).or_default().1 += num(&r[2]);
    }
    for (m, (b, d)) in &totals {
        assert!((b - d).abs() <= 1e-3 * d.max(1.0), "{m}: bands {b} kWh, days {d} kWh");
    }
    // A day with a register read carries the read exactly, with no band around it.
    let regs = std::fs::read_to_string(p("reg.csv")).expect("reg");
    let mut checked = 0;
    for l in regs.lines().skip(1) {
        let c: Vec<&str> = l.split(',').collect();
        let day = chrono::DateTime::from_timestamp(c[1].parse().expect("day"), 0).expect("t").date_naive().to_string();
        let row = daily.iter().find(|r| r[0] == c[0] && r[1] == day).expect("the read's day");
        assert_eq!(row[6], "true", "{row:?}");
        assert!((num(&row[2]) * 1000.0 - num(c[2])).abs() <= 0.5, "{l}: {row:?}");
        assert!(num(&row[4]) - num(&row[3]) <= 1e-3, "{row:?}");
        checked += 1;
    }
    assert_eq!(checked, 180);
    // Overlap: the night rule starting at 22:00 meets the day rule; nothing is written.
    let overlap = tariff.replace(r#""from": "23:00", "to": "07:00""#, r#""from": "22:00", "to": "07:00""#);
    let r = run(&overlap, "-x");
    let err = String::from_utf8_lossy(&r.stderr);
    assert!(!r.status.success() && err.contains("line 7") && err.contains("bands[1].from"), "{err}");
    let gap = tariff.replace(r#""from": "00:00", "to": "24:00""#, r#""from": "00:00", "to": "23:00""#);
    let r = run(&gap, "-x");
    let err = String::from_utf8_lossy(&r.stderr);
    assert!(!r.status.success() && err.contains("no band covers sat from 23:00 to 24:00"), "{err}");
    for f in ["agg-x.csv", "bands-x.csv", "daily-x.csv"] {
        assert!(!p(f).exists(), "a refused calendar wrote {f}");
    }
    for (flag, value, why) in
        [("--band-draws", "33", "--band-draws: at most 32"), ("--rank", "0", "--rank: must be at least 1")]
    {
        let r = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
            .args(["aggregate", "--profiles"])
            .arg(out)
            .args(["--groups".as_ref(), p("groups.csv").as_os_str()])
            .args(["--output".as_ref(), p("agg-y.csv").as_os_str()])
            .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
            .args(["--profile".as_ref(), p("profile.json").as_os_str()])
            .args([flag, value])
            .output()
            .expect("run aggregate");
        let err = String::from_utf8_lossy(&r.stderr);
        assert!(!r.status.success() && err.contains(why), "{flag} {value}: {err}");
        assert!(!p("agg-y.csv").exists(), "a refused bootstrap wrote its output");
    }
}

/// A group defined over HTTP and its load from a finished recovery: the band
/// holds the estimate, the sum of the members' means stays near the sum of
/// their recovered profiles, and bad definitions or windows are refused with
/// the field named and nothing stored.
/// The published ESPI schema's verdict on an XML file (xmlschema, through
/// `tests/reference/validate_espi.py`).
fn validate_espi(p: &std::path::Path) -> Value {
    let python = std::env::var("METERVEIL_PYTHON").unwrap_or_else(|_| "python3".into());
    let dir = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference");
    let out = std::process::Command::new(python)
        .arg(format!("{dir}/validate_espi.py"))
        .arg(format!("{dir}/espi"))
        .arg(p)
        .output()
        .expect("python");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("json")
}

/// Starts a recovery and waits for it; the finished job.
async fn recovery_done(t: &TestService, body: Value) -> Value {
    let (s, b) = t.post_json("/v1/recoveries", &body, true).await;
    assert_eq!(s, StatusCode::ACCEPTED, "{b}");
    let id = b["job_id"].as_str().expect("id").to_owned();
    for _ in 0..600 {
        let job: Value = t
            .http
            .get(format!("{}/v1/recoveries/{id}", t.url()))
            .bearer_auth(TOKEN)
            .send()
            .await
            .expect("status")
            .json()
            .await
            .expect("json");
        if job["state"] == "done" || job["state"] == "failed" {
            assert_eq!(job["state"], "done", "{job}");
            return job;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    panic!("recovery {id} did not finish");
}

/// A rolling run: days 1-3 fitted from the fit of days 0-2 (`warm_from`), beside a
/// cold fit of days 1-3. The warm run keeps the earlier rank, skips the rank
/// search, does less work and lands near the cold fit; a warm start of another
/// feeder, of a window that does not hold the start, or of no job is refused.
async fn rolling_recovery_over_http(t: &TestService, from: i64) {
    const DAY: i64 = 86_400;
    let feeder = "QM-CHAPEL-ROW";
    let prev = recovery_done(t, json!({"feeder_id": feeder, "from": from, "to": from + 3 * DAY})).await;
    let prev_id = prev["job_id"].as_str().expect("id");
    let window = json!({"feeder_id": feeder, "from": from + DAY, "to": from + 4 * DAY});
    let cold = recovery_done(t, window.clone()).await;
    let mut body = window.clone();
    body["warm_from"] = prev_id.into();
    let warm = recovery_done(t, body).await;
    let (wd, cd) = (&warm["diagnostics"], &cold["diagnostics"]);
    assert_eq!((wd["warm_start"].as_bool(), wd["warm_from"].as_str()), (Some(true), Some(prev_id)), "{wd}");
    assert_eq!(wd["rank"], prev["diagnostics"]["rank"], "the earlier fit's rank");
    assert_eq!(wd["search_iterations"], 0, "no rank search");
    let work = |d: &Value| d["search_iterations"].as_u64().unwrap_or(0) + d["iterations"].as_u64().unwrap_or(0);
    assert!(work(wd) < work(cd), "warm {} iterations, cold {}", work(wd), work(cd));
    let rows = |job: &Value| {
        let id = job["job_id"].as_str().expect("id").to_owned();
        async move {
            let r: Vec<Value> = t
                .http
                .get(format!("{}/v1/recoveries/{id}/intervals", t.url()))
                .bearer_auth(TOKEN)
                .send()
                .await
                .expect("rows")
                .json()
                .await
                .expect("json");
            r.iter().map(|v| v["kw"].as_f64().expect("kw")).collect::<Vec<f64>>()
        }
    };
    let (w, c) = (rows(&warm).await, rows(&cold).await);
    assert_eq!(w.len(), c.len());
    let diff = w.iter().zip(&c).map(|(a, b)| (a - b).powi(2)).sum::<f64>().sqrt();
    let norm = c.iter().map(|b| b * b).sum::<f64>().sqrt();
    eprintln!(
        "rolling over HTTP: warm {} iterations, cold {}; ‖warm − cold‖ / ‖cold‖ = {:.4}",
        work(wd),
        work(cd),
        diff / norm
    );
    // The interval shapes of 12 meters over 3 days differ between any two fits
    // (7-11% measured here, with the simulation's fresh dither): their accuracy
    // against the truth is measured on seeded populations in
    // shared/tests/recovery_rolling.rs. What settles is pinned: each
    // meter-day's energy meets its daily read in both runs.
    for (d, (a, b)) in w.chunks(96).zip(c.chunks(96)).enumerate() {
        let (ea, eb) = (a.iter().sum::<f64>() * 250.0, b.iter().sum::<f64>() * 250.0);
        assert!((ea - eb).abs() <= 2.0, "meter-day {d}: warm {ea} Wh, cold {eb} Wh");
    }

    // The comparison of the two runs over the days both hold (days 1 and 2):
    // nothing new arrived for them and their daily reads pin each day, so
    // every meter-day is unchanged.
    let warm_id = warm["job_id"].as_str().expect("id");
    let cmp: Value = t
        .http
        .get(format!("{}/v1/recoveries/{prev_id}/compare/{warm_id}", t.url()))
        .bearer_auth(TOKEN)
        .send()
        .await
        .expect("compare")
        .json()
        .await
        .expect("json");
    assert_eq!(cmp["meter_days"], 12 * 2, "{cmp}");
    assert_eq!(cmp["reasons"], json!({"unchanged": 24}), "{cmp}");
    let days = cmp["days"].as_array().expect("days");
    assert!(days
        .iter()
        .all(|d| d["earlier_readings"] == d["later_readings"] && d["day_start"].as_i64() >= Some(from + DAY)));
    let other = recovery_done(t, json!({"feeder_id": "QM-MILLPOND", "from": from, "to": from + DAY})).await;
    let r = t
        .http
        .get(format!("{}/v1/recoveries/{prev_id}/compare/{}", t.url(), other["job_id"].as_str().expect("id")))
        .bearer_auth(TOKEN)
        .send()
        .await
        .expect("compare");
    assert_eq!(r.status().as_u16(), 422);
    assert_eq!(r.json::<Value>().await.expect("json")["field"], "later");

    let cold_id = cold["job_id"].as_str().expect("id");
    for (bad, why) in [
        (json!({"feeder_id": "QM-MILLPOND", "from": from + DAY, "to": from + 4 * DAY, "warm_from": prev_id}), "feeder"),
        (json!({"feeder_id": feeder, "from": from, "to": from + 4 * DAY, "warm_from": cold_id}), "window"),
        (
            json!({"feeder_id": feeder, "from": from + DAY, "to": from + 4 * DAY, "warm_from": "rec-none"}),
            "no recovery",
        ),
    ] {
        let (s, b) = t.post_json("/v1/recoveries", &bad, true).await;
        assert_eq!((s, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("warm_from")), "{b}");
        assert!(b["reason"].as_str().unwrap_or("").contains(why), "{b}");
    }
}

async fn group_loads_over_http(t: &TestService, id: &str, rows: &[Value], (from, to): (i64, i64)) {
    let put = |name: &str, body: Value| {
        t.http.put(format!("{}/v1/groups/{name}", t.url())).bearer_auth(TOKEN).json(&body).send()
    };
    let get = |path: String| t.http.get(format!("{}{path}", t.url())).bearer_auth(TOKEN).send();
    let members = ["QM-CHAPEL-ROW-0001", "QM-CHAPEL-ROW-0002", "QM-CHAPEL-ROW-0003", "QM-CHAPEL-ROW-0004"];
    let r = put("transformer-7", json!({"meters": members})).await.expect("put");
    assert_eq!(r.status().as_u16(), 200, "{:?}", r.text().await);
    let g: Value = get("/v1/groups/transformer-7".into()).await.expect("group").json().await.expect("json");
    assert_eq!(g["meters"], json!(members));
    // Refused: an unregistered meter, a meter twice, an empty list; the group keeps its members.
    for (body, field) in [
        (json!({"meters": ["QM-CHAPEL-ROW-0001", "QM-NOWHERE-0009"]}), "meters[1]"),
        (json!({"meters": ["QM-CHAPEL-ROW-0001", "QM-CHAPEL-ROW-0001"]}), "meters[1]"),
        (json!({"meters": []}), "meters"),
    ] {
        let r = put("transformer-7", body.clone()).await.expect("put");
        let status = r.status().as_u16();
        let b: Value = r.json().await.expect("json");
        assert!(status >= 400 && b["field"] == field, "{body}: {status} {b}");
    }
    let g: Value = get("/v1/groups/transformer-7".into()).await.expect("group").json().await.expect("json");
    assert_eq!(g["meters"], json!(members), "a refused definition changed nothing");
    let load: Value =
        get(format!("/v1/recoveries/{id}/groups/transformer-7")).await.expect("load").json().await.expect("json");
    assert_eq!(load["meters"], 4);
    let points = load["points"].as_array().expect("points");
    assert_eq!(points.len(), 4 * 96);
    let mut recovered: std::collections::HashMap<i64, f64> = Default::default();
    for r in rows.iter().filter(|r| members.contains(&r["meter_id"].as_str().expect("m"))) {
        *recovered.entry(r["interval_start"].as_i64().expect("t")).or_default() += r["kw"].as_f64().expect("kw");
    }
    let (mut sum_band, mut sum_rec) = (0.0, 0.0);
    for p in points {
        let (kw, lo, hi) =
            (p["kw"].as_f64().expect("kw"), p["kw_low"].as_f64().expect("lo"), p["kw_high"].as_f64().expect("hi"));
        assert!(lo <= kw && kw <= hi, "{p}");
        sum_band += kw;
        sum_rec += recovered[&p["interval_start"].as_i64().expect("t")];
    }
    assert!((sum_band - sum_rec).abs() <= 0.15 * sum_rec, "group energy {sum_band} against recovered {sum_rec}");
    let csv = get(format!(
        "/v1/recoveries/{id}/groups/transformer-7?format=csv&from={}&to={}",
        points[96]["interval_start"], points[192]["interval_start"]
    ))
    .await
    .expect("csv")
    .text()
    .await
    .expect("text");
    assert!(csv.starts_with("group,interval_start,kw,kw_low,kw_high,meters\n"), "{csv}");
    assert_eq!(csv.lines().count(), 1 + 96);
    // The group's load as ESPI, valid against the published schema, its
    // readings summing to the group's energy in mWh (a 15-minute kW is 250,000 mWh).
    let xml = get(format!("/v1/recoveries/{id}/groups/transformer-7?format=espi"))
        .await
        .expect("espi")
        .text()
        .await
        .expect("text");
    let file = tempfile::NamedTempFile::new().expect("tmp");
    std::fs::write(file.path(), &xml).expect("write");
    assert_eq!(validate_espi(file.path())["valid"], true);
    assert_eq!(xml.matches("<espi:IntervalReading>").count(), 4 * 96);
    let mwh: f64 = xml
        .split("<espi:value>")
        .skip(1)
        .map(|v| v.split('<').next().expect("value").parse::<f64>().expect("number"))
        .sum();
    assert!((mwh - 250_000.0 * sum_band).abs() <= 0.001 * mwh, "ESPI {mwh} mWh, group {sum_band} kW-intervals");
    for (query, field) in [("?from=5&to=4", "to"), ("?format=xml", "format")] {
        let r = get(format!("/v1/recoveries/{id}/groups/transformer-7{query}")).await.expect("bad");
        let b: Value = r.json().await.expect("json");
        assert_eq!(b["field"], field, "{query}: {b}");
    }
    let r = get(format!("/v1/recoveries/{id}/groups/no-such-group")).await.expect("missing");
    assert_eq!(r.status().as_u16(), 404);
    // The bands carry the fit's own error from the recovery's bootstrap (8
    // refits by default): the same window recovered without it (the same
    // estimates: same levels, same seed) has narrower bands, never wider.
    assert_eq!(load["bootstrap_draws"], 8, "{}", load["bootstrap_draws"]);
    let plain =
        recovery_done(t, json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "rank": 5, "band_draws": 0}))
            .await;
    let plain_id = plain["job_id"].as_str().expect("id");
    let narrow: Value =
        get(format!("/v1/recoveries/{plain_id}/groups/transformer-7")).await.expect("load").json().await.expect("json");
    assert_eq!(narrow["bootstrap_draws"], 0);
    let width = |p: &Value| p["kw_high"].as_f64().expect("hi") - p["kw_low"].as_f64().expect("lo");
    let (mut wider, mut total) = (0, 0.0);
    for (a, b) in points.iter().zip(narrow["points"].as_array().expect("points")) {
        assert!((a["kw"].as_f64().expect("kw") - b["kw"].as_f64().expect("kw")).abs() < 1e-6, "{a} {b}");
        assert!(width(a) >= width(b) - 1e-9, "{a} narrower than without the bootstrap {b}");
        wider += usize::from(width(a) > width(b) + 1e-6);
        total += width(a) / width(b).max(1e-9);
    }
    assert!(wider > points.len() / 2, "the bootstrap widened {wider} of {} bands", points.len());
    eprintln!("group bands with the bootstrap: {:.2}x as wide on average", total / points.len() as f64);
    let (st, b) = t
        .post_json(
            "/v1/recoveries",
            &json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "band_draws": 33}),
            true,
        )
        .await;
    assert_eq!((st, b["field"].as_str()), (StatusCode::UNPROCESSABLE_ENTITY, Some("band_draws")), "{b}");
}

/// A feeder's tariff calendar stored as versions, and each meter's band
/// energies from a finished recovery: with a register read on every day, each
/// meter's bands sum exactly to its reads. A calendar with an overlap is
/// refused naming its field and line, and no version is stored.
async fn band_energies_over_http(t: &TestService, id: &str, reads: &[(String, i64, i64)]) {
    let post = |body: String| {
        t.http.post(format!("{}/v1/feeders/QM-CHAPEL-ROW/tariffs", t.url())).bearer_auth(TOKEN).body(body).send()
    };
    let get = |path: String| t.http.get(format!("{}{path}", t.url())).bearer_auth(TOKEN).send();
    let calendar = r#"{
  "name": "Chapel Row two-rate",
  "time_zone": "Europe/London",
  "billing_day": 1,
  "bands": [
    { "band": "peak", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "16:00", "to": "19:00" },
    { "band": "standard", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "19:00", "to": "16:00" },
    { "band": "standard", "days": ["sat", "sun", "holiday"], "from": "00:00", "to": "24:00" }
  ]
}"#;
    let overlap = calendar.replace(r#""from": "19:00""#, r#""from": "18:00""#);
    let r = post(overlap).await.expect("post");
    assert_eq!(r.status().as_u16(), 422);
    let b: Value = r.json().await.expect("json");
    assert_eq!(b["field"], "bands[1].from", "{b}");
    assert!(b["reason"].as_str().expect("reason").starts_with("line 7: overlaps bands[0] (peak)"), "{b}");
    let listed: Vec<Value> =
        get("/v1/feeders/QM-CHAPEL-ROW/tariffs".into()).await.expect("list").json().await.expect("json");
    assert!(listed.is_empty(), "a refused calendar stored nothing: {listed:?}");
    for expected in [1, 2] {
        let r = post(calendar.to_owned()).await.expect("post");
        assert_eq!(r.status().as_u16(), 201);
        let b: Value = r.json().await.expect("json");
        assert_eq!(b["version"], expected, "{b}");
    }
    let got: Value = get(format!("/v1/recoveries/{id}/band-energies?tariff_version=1"))
        .await
        .expect("bands")
        .json()
        .await
        .expect("json");
    assert_eq!(got["tariff_version"], 1);
    let mut per_meter: std::collections::HashMap<String, f64> = Default::default();
    for e in got["energies"].as_array().expect("energies") {
        assert!(["peak", "standard"].contains(&e["band"].as_str().expect("band")), "{e}");
        let (kwh, lo, hi) =
            (e["kwh"].as_f64().expect("kwh"), e["kwh_low"].as_f64().expect("lo"), e["kwh_high"].as_f64().expect("hi"));
        assert!(lo <= kwh + 1e-9 && kwh <= hi + 1e-9, "{e}");
        assert_eq!(e["register_read"], true, "{e}");
        *per_meter.entry(e["meter_id"].as_str().expect("m").to_owned()).or_default() += kwh;
    }
    let mut from_reads: std::collections::HashMap<String, f64> = Default::default();
    for (m, _, wh) in reads {
        *from_reads.entry(m.clone()).or_default() += *wh as f64 / 1000.0;
    }
    assert_eq!(per_meter.len(), 12);
    for (m, kwh) in &per_meter {
        assert!((kwh - from_reads[m]).abs() <= 1e-3, "{m}: bands {kwh} kWh, reads {} kWh", from_reads[m]);
    }
    let csv = get(format!("/v1/recoveries/{id}/band-energies?format=csv")).await.expect("csv").text().await.expect("t");
    assert!(csv.starts_with("meter_id,period_start,period_end,band,kwh,kwh_low,kwh_high,intervals,register_read\n"));
    let r = get(format!("/v1/recoveries/{id}/band-energies?tariff_version=9")).await.expect("missing");
    assert_eq!(r.status().as_u16(), 404);
    assert_eq!(got["bootstrap_draws"], 8);
    // Each meter's energy per UTC day: every day has a read, so each is its read.
    let days: Value = get(format!("/v1/recoveries/{id}/day-energies")).await.expect("days").json().await.expect("json");
    assert_eq!((&days["days"], &days["bootstrap_draws"]), (&json!("UTC"), &json!(8)), "{}", days["days"]);
    let by_day: std::collections::HashMap<(String, i64), f64> =
        reads.iter().map(|(m, start, wh)| ((m.clone(), *start), *wh as f64 / 1000.0)).collect();
    let energies = days["energies"].as_array().expect("energies");
    assert_eq!(energies.len(), 12 * 4);
    for e in energies {
        let day = chrono::NaiveDate::parse_from_str(e["day"].as_str().expect("day"), "%Y-%m-%d").expect("date");
        let start = day.and_hms_opt(0, 0, 0).expect("midnight").and_utc().timestamp();
        let read = by_day[&(e["meter_id"].as_str().expect("m").to_owned(), start)];
        assert!((e["kwh"].as_f64().expect("kwh") - read).abs() <= 1e-3, "{e}: read {read} kWh");
        assert_eq!(e["register_read"], true, "{e}");
    }
    let csv = get(format!("/v1/recoveries/{id}/day-energies?format=csv&days=local")).await.expect("csv").text().await;
    assert!(csv.expect("text").starts_with("meter_id,day,kwh,kwh_low,kwh_high,intervals,register_read\n"));
    let r = get(format!("/v1/recoveries/{id}/day-energies?days=solar")).await.expect("bad");
    assert_eq!(r.json::<Value>().await.expect("json")["field"], "days");
}

fn last_json_line(out: &[u8]) -> Value {
    serde_json::from_slice(out.split(|b| *b == b'\n').rfind(|l| !l.is_empty()).expect("line")).expect("json")
}

#[test]
fn audit_and_calibrate_commands_on_files() {
    let dir = tempfile::tempdir().expect("tempdir");
    write_town_files(dir.path(), 60, 7);
    let p = |f: &str| dir.path().join(f);
    std::fs::write(p("captured.txt"), "# the meters an eavesdropper holds\nQM-CHAPEL-ROW-0001\n").expect("write");
    let bin = env!("CARGO_BIN_EXE_utility-service");
    let run = std::process::Command::new(bin)
        .arg("audit")
        .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
        .args(["--profile".as_ref(), p("profile.json").as_os_str()])
        .args(["--captured".as_ref(), p("captured.txt").as_os_str()])
        .args(["--output".as_ref(), p("audit.json").as_os_str()])
        .args(["--html".as_ref(), p("audit.html").as_os_str()])
        .output()
        .expect("run audit");
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let a: Value = serde_json::from_str(&std::fs::read_to_string(p("audit.json")).expect("audit")).expect("json");
    for key in [
        "strongest.nrmse",
        "strongest.event_f1",
        "strongest.strategy",
        "strongest.event_f1_tuned_elsewhere",
        "strongest.event_by_kind",
        "utility.nrmse",
        "utility.event_f1",
        "mechanism.mutual_information_bits",
        "mechanism.ldp_epsilon",
    ] {
        let (a0, a1) = key.split_once('.').expect("dotted");
        assert!(!a[a0][a1].is_null(), "{key} missing");
    }
    let strategies: Vec<&str> =
        a["strategies"].as_array().expect("s").iter().filter_map(|s| s["strategy"].as_str()).collect();
    assert!(strategies.contains(&"day_folding") && strategies.contains(&"posterior_mean"), "{strategies:?}");
    assert_eq!(a["captured_meters"], 1);
    // Every kind of the documented mix is scored, and the captured meter's
    // recovered profile was checked against its own uploads.
    assert_eq!(a["strongest"]["event_by_kind"].as_array().map(Vec::len), a["event_mix"].as_array().map(Vec::len));
    assert_eq!(a["base_checks"].as_array().map(Vec::len), Some(1), "{}", a["base_checks"]);
    assert!(a["direct"]["strategies"].as_array().is_some_and(|s| s.len() == strategies.len()));
    assert!(!a["curve_captured"].as_array().expect("curve").is_empty());
    let html = std::fs::read_to_string(p("audit.html")).expect("html");
    assert!(
        html.contains("<svg") && html.contains("not a legal privacy") && !html.contains("http://")
            || html.contains("www.w3.org")
    );
    assert!(!html.contains("<script"));
    assert!(html.contains("Per event kind") && html.contains("tuned on 2 other simulated households"));
    assert!(html.contains("still reveals") || html.contains("mostly hides") || html.contains("partly reveals"));
    let summary = last_json_line(&run.stdout);
    assert_eq!(summary["strongest"]["strategy"], a["strongest"]["strategy"]);

    // A captured meter that is not in the levels file names its line and writes nothing.
    std::fs::write(p("bad.txt"), "QM-CHAPEL-ROW-0001\nQM-NOWHERE-0009\n").expect("write");
    let run = std::process::Command::new(bin)
        .arg("audit")
        .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
        .args(["--profile".as_ref(), p("profile.json").as_os_str()])
        .args(["--captured".as_ref(), p("bad.txt").as_os_str()])
        .args(["--output".as_ref(), p("audit2.json").as_os_str()])
        .output()
        .expect("run audit");
    let err = String::from_utf8_lossy(&run.stderr);
    assert!(!run.status.success() && err.contains("bad.txt line 2") && err.contains("meter_id"), "{err}");
    assert!(!p("audit2.json").exists());

    let run = std::process::Command::new(bin)
        .arg("calibrate")
        .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
        .args(["--profile".as_ref(), p("profile.json").as_os_str()])
        .args(["--output".as_ref(), p("recommended.json").as_os_str()])
        .args(["--report".as_ref(), p("calibration.json").as_os_str()])
        .args(["--html".as_ref(), p("calibration.html").as_os_str()])
        .args(["--max-event-f1", "0.5", "--captured", "1", "--max-energy-error", "0.3"])
        .output()
        .expect("run calibrate");
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let c: Value = serde_json::from_str(&std::fs::read_to_string(p("calibration.json")).expect("c")).expect("json");
    let summary = last_json_line(&run.stdout);
    assert_eq!(summary["meets_targets"], c["meets_targets"]);
    // Each level set's scale search says how it ended.
    let searches = summary["searches"].as_array().expect("searches");
    assert!(!searches.is_empty(), "{summary}");
    for sc in searches {
        let stop = &sc["stop"];
        let known = ["converged", "max_iterations", "smallest_scale_meets", "no_scale_meets"];
        assert!(stop.as_str().is_some_and(|v| known.contains(&v)), "unexpected stop {stop} in {summary}");
        assert_eq!(sc["bracket_kw"].is_null(), sc["iterations"] == 0, "{sc}");
    }
    if c["meets_targets"] == true {
        let rec = std::fs::read_to_string(p("recommended.json")).expect("recommended profile");
        meterveil_shared::DitherProfile::from_json(&rec).expect("a valid profile");
    } else {
        assert!(!p("recommended.json").exists());
        assert!(c["message"].as_str().unwrap_or("").contains("cannot both be met"));
    }
    assert!(std::fs::read_to_string(p("calibration.html")).expect("html").contains("<svg"));
    let run = std::process::Command::new(bin)
        .arg("calibrate")
        .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
        .args(["--profile".as_ref(), p("profile.json").as_os_str()])
        .args(["--output".as_ref(), p("r2.json").as_os_str()])
        .args(["--max-event-f1", "1.5"])
        .output()
        .expect("run calibrate");
    let err = String::from_utf8_lossy(&run.stderr);
    assert!(!run.status.success() && err.contains("event-f1-max"), "{err}");
    // A band target without the calendar it is measured on is refused before any work.
    let run = std::process::Command::new(bin)
        .arg("calibrate")
        .args(["--levels".as_ref(), p("levels.csv").as_os_str()])
        .args(["--profile".as_ref(), p("profile.json").as_os_str()])
        .args(["--output".as_ref(), p("r3.json").as_os_str()])
        .args(["--max-band-error", "0.1"])
        .output()
        .expect("run calibrate");
    let err = String::from_utf8_lossy(&run.stderr);
    assert!(!run.status.success() && err.contains("--max-band-error") && err.contains("--tariff"), "{err}");
    assert!(!p("r3.json").exists());
}

/// A `utility-service serve` child process on a free port; returns it and its URL.
fn serve_child(db: &str, lease_s: u32) -> (std::process::Child, String) {
    serve_child_with(db, lease_s, &[])
}

/// [`serve_child`] with extra environment variables.
fn serve_child_with(db: &str, lease_s: u32, env: &[(&str, &std::path::Path)]) -> (std::process::Child, String) {
    use std::io::BufRead;
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .envs(env.iter().map(|(k, v)| (*k, *v)))
        .args(["serve", "--bind", "127.0.0.1:0", "--operator-token", TOKEN, "--job-lease-s", &lease_s.to_string()])
        .args(["--gateway-master-key", "test-master-key-0123456789abcdef0123456789"])
        .args(["--database-url", db])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("start utility-service serve");
    let mut line = String::new();
    std::io::BufReader::new(child.stdout.take().expect("stdout")).read_line(&mut line).expect("read");
    let url = line.trim().strip_prefix("listening on ").expect("listening line").to_owned();
    (child, url)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_job_whose_worker_is_killed_is_retried_by_another_and_never_half_served() {
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    // Fill the database through an in-process service that runs no worker.
    let feeder_meters;
    let (from, to);
    {
        let mut config = ServiceConfig::local(db.clone(), Secret::new(TOKEN));
        config.run_worker = false;
        let svc = app::start(config).await.expect("service");
        let mut opts = SimulateOptions::new(svc.url(), dir.path().join("outboxes"));
        opts.operator_token = Some(TOKEN.into());
        opts.meters = 400;
        opts.days = 7;
        let report = simulate::run(&opts).await.expect("simulation");
        from = report.first_day;
        to = from + 7 * 86_400;
        feeder_meters = svc.store.meters_of(&FeederId::parse("QM-MILLPOND").expect("id")).await.expect("m").len();
        svc.stop().await.expect("stop");
    }
    let http = reqwest::Client::new();
    let (mut first, url) = serve_child(&db, 3);
    let job: Value = http
        .post(format!("{url}/v1/recoveries"))
        .bearer_auth(TOKEN)
        .json(&json!({"feeder_id": "QM-MILLPOND", "from": from, "to": to, "rank": "auto"}))
        .send()
        .await
        .expect("post")
        .json()
        .await
        .expect("json");
    let id = job["job_id"].as_str().expect("id").to_owned();
    let status = |url: String| {
        let http = http.clone();
        let id = id.clone();
        async move {
            http.get(format!("{url}/v1/recoveries/{id}"))
                .bearer_auth(TOKEN)
                .send()
                .await
                .expect("get")
                .json::<Value>()
                .await
                .expect("json")
        }
    };
    // Kill the first worker once it is computing.
    let mut seen = Value::Null;
    for _ in 0..600 {
        seen = status(url.clone()).await;
        if seen["state"] == "running" && seen["progress"].as_f64().unwrap_or(0.0) > 0.0 {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    }
    assert_eq!(seen["state"], "running", "{seen}");
    first.kill().expect("SIGKILL");
    first.wait().expect("reaped");
    let store = meterveil_service::store::Store::open(&db).await.expect("open");
    let partial: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM recovered_intervals WHERE job_id = $1")
        .bind(&id)
        .fetch_one(store.pool())
        .await
        .expect("count");
    assert_eq!(partial, 0, "a killed worker left results behind");

    // A second process takes the job over once the lease has run out, and is
    // killed in the middle of writing the results (after its first 700 rows,
    // inside the transaction): none of them may remain.
    let marker = dir.path().join("paused-in-result-write");
    let (mut second, _) = serve_child_with(&db, 3, &[("METERVEIL_TEST_PAUSE_RESULT_WRITE", &marker)]);
    for _ in 0..1200 {
        if marker.exists() {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    assert!(marker.exists(), "the second worker never reached the result write");
    second.kill().expect("SIGKILL");
    second.wait().expect("reaped");
    let (partial, state): (i64, String) = (
        sqlx::query_scalar("SELECT COUNT(*) FROM recovered_intervals WHERE job_id = $1")
            .bind(&id)
            .fetch_one(store.pool())
            .await
            .expect("count"),
        sqlx::query_scalar("SELECT state FROM recovery_jobs WHERE job_id = $1")
            .bind(&id)
            .fetch_one(store.pool())
            .await
            .expect("state"),
    );
    assert_eq!((partial, state.as_str()), (0, "running"), "a worker killed while writing left a half-written result");

    // A third process takes it over and finishes it.
    let (mut third, url2) = serve_child(&db, 3);
    let r = http.get(format!("{url2}/v1/recoveries/{id}/intervals")).bearer_auth(TOKEN).send().await.expect("get");
    assert_eq!(r.status().as_u16(), 409, "results are not served before the job is done");
    let mut done = Value::Null;
    for _ in 0..1200 {
        done = status(url2.clone()).await;
        if done["state"] == "done" || done["state"] == "failed" {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    let _ = third.kill();
    let _ = third.wait();
    assert_eq!(done["state"], "done", "{done}");
    let attempts: i64 = sqlx::query_scalar("SELECT attempts FROM recovery_jobs WHERE job_id = $1")
        .bind(&id)
        .fetch_one(store.pool())
        .await
        .expect("attempts");
    assert_eq!(attempts, 3);
    let rows: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM recovered_intervals WHERE job_id = $1")
        .bind(&id)
        .fetch_one(store.pool())
        .await
        .expect("count");
    assert_eq!(rows as usize, feeder_meters * 7 * 96);
    // The operator's job list shows it, with its three attempts.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .args(["jobs", "--database-url", &db])
        .output()
        .expect("jobs");
    let text = String::from_utf8_lossy(&out.stdout);
    let line = text.lines().find(|l| l.starts_with(&id)).unwrap_or_else(|| panic!("{text}"));
    assert!(line.contains(" done ") && line.contains("100%") && line.contains("  3  "), "{line}");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .args(["jobs", "--database-url", &db])
        .args(["cancel", &id])
        .output()
        .expect("jobs cancel");
    assert!(!out.status.success() && String::from_utf8_lossy(&out.stderr).contains("already ended"));
}

/// Dashboard sessions live in the database: a session opened on one `serve`
/// process is accepted by a second on the same database, and by both after
/// they restart; a link minted by `utility-service dashboard-link` works on
/// either, once. Only digests are stored.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn dashboard_sessions_hold_across_processes_and_restarts() {
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    let http = reqwest::Client::builder().redirect(reqwest::redirect::Policy::none()).build().expect("client");
    let (mut a, url_a) = serve_child(&db, 30);
    let (mut b, url_b) = serve_child(&db, 30);
    // Sign in on A with a name and the operator token; without a name, the form comes back naming it.
    let login = |body: String| {
        let (http, url) = (http.clone(), format!("{url_a}/dashboard/login"));
        async move {
            http.post(url)
                .header("content-type", "application/x-www-form-urlencoded")
                .body(body)
                .send()
                .await
                .expect("login")
        }
    };
    let r = login(format!("token={TOKEN}")).await;
    assert_eq!(r.status().as_u16(), 400);
    assert!(r.text().await.expect("text").contains("Not signed in: who"));
    let r = login(format!("who=wren+on+duty&token={TOKEN}")).await;
    assert!(r.status().is_redirection(), "{}", r.status());
    let set = r.headers()["set-cookie"].to_str().expect("cookie").to_owned();
    let cookie = set.split(';').next().expect("name=value").to_owned();
    let secret = cookie.split_once('=').expect("=").1.to_owned();
    let overview = |url: String, cookie: String| {
        let http = http.clone();
        async move {
            let r = http.get(format!("{url}/dashboard")).header("cookie", cookie).send().await.expect("get");
            r.status().as_u16()
        }
    };
    assert_eq!(overview(url_b.clone(), cookie.clone()).await, 200, "B does not know A's session");
    assert_eq!(overview(url_b.clone(), format!("mv_session={}", "0".repeat(32))).await, 303, "a made-up session");
    // Only the secret's digest is stored.
    let store = meterveil_service::store::Store::open(&db).await.expect("open");
    let stored: Vec<String> = sqlx::query_scalar("SELECT token_sha256 FROM dashboard_sessions")
        .fetch_all(store.pool())
        .await
        .expect("sessions");
    assert_eq!(stored, vec![meterveil_shared::auth::body_sha256(secret.as_bytes())]);
    let who: String =
        sqlx::query_scalar("SELECT operator_name FROM dashboard_sessions").fetch_one(store.pool()).await.expect("who");
    assert_eq!(who, "wren on duty");
    // Both restart: the session holds.
    for c in [&mut a, &mut b] {
        c.kill().expect("kill");
        c.wait().expect("reaped");
    }
    let (mut a, url_a) = serve_child(&db, 30);
    let (mut b, url_b) = serve_child(&db, 30);
    assert_eq!(overview(url_a.clone(), cookie.clone()).await, 200, "the session did not survive a restart");
    assert_eq!(overview(url_b.clone(), cookie.clone()).await, 200);
    // A link minted from the command line opens a session on B, once.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .args(["dashboard-link", "--database-url", &db, "--url", &url_b])
        .output()
        .expect("dashboard-link");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let link = String::from_utf8_lossy(&out.stdout).trim().to_owned();
    assert!(link.starts_with(&format!("{url_b}/dashboard/enter?code=")), "{link}");
    let r = http.get(&link).send().await.expect("enter");
    assert!(r.status().is_redirection() && r.headers().contains_key("set-cookie"), "{}", r.status());
    let r = http.get(link.replace(&url_b, &url_a)).send().await.expect("enter again");
    assert_eq!(r.status().as_u16(), 401, "a one-time link worked twice");
    for c in [&mut a, &mut b] {
        let _ = c.kill();
        let _ = c.wait();
    }
}

/// Headless Chromium driven through WebDriver (Debian's chromium and
/// chromium-driver, installed by the test command): it loads pages, fills and
/// clicks the dashboard's forms as a person would, and takes screenshots.
struct Browser {
    client: fantoccini::Client,
    driver: std::process::Child,
    shots: std::path::PathBuf,
    base: String,
}

impl Browser {
    async fn start(base: String) -> Browser {
        let port = std::net::TcpListener::bind("127.0.0.1:0").expect("port").local_addr().expect("addr").port();
        let bin = std::env::var("METERVEIL_CHROMEDRIVER").unwrap_or_else(|_| "chromedriver".into());
        let driver = std::process::Command::new(&bin)
            .arg(format!("--port={port}"))
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("cannot run {bin}: {e}; the README test command installs chromium-driver"));
        let mut caps = serde_json::Map::new();
        let chromium = std::env::var("METERVEIL_CHROMIUM").unwrap_or_else(|_| "/usr/bin/chromium".into());
        caps.insert(
            "goog:chromeOptions".into(),
            json!({"binary": chromium, "args": ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--window-size=1280,1600"]}),
        );
        let mut last = String::new();
        for _ in 0..100 {
            let mut connector =
                fantoccini::ClientBuilder::new(hyper_util::client::legacy::connect::HttpConnector::new());
            match connector.capabilities(caps.clone()).connect(&format!("http://127.0.0.1:{port}")).await {
                Ok(client) => {
                    let shots = std::path::Path::new(env!("CARGO_TARGET_TMPDIR")).join("screenshots");
                    std::fs::create_dir_all(&shots).expect("screenshot dir");
                    return Browser { client, driver, shots, base };
                }
                Err(e) => last = e.to_string(),
            }
            tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        }
        panic!("chromedriver did not start: {last}");
    }

    async fn open(&self, path: &str) -> String {
        self.client.goto(&format!("{}{path}", self.base)).await.expect("goto");
        self.source().await
    }

    async fn source(&self) -> String {
        self.client.source().await.expect("page source")
    }

    /// The path of the page the browser is on.
    async fn at(&self) -> String {
        self.client.current_url().await.expect("url").path().to_owned()
    }

    /// Fills the form posting to `action` and clicks its button; the page that follows.
    async fn submit(&self, action: &str, fields: &[(&str, &str)]) -> String {
        let css = format!("form[action='{action}']");
        let form = self.client.form(fantoccini::Locator::Css(&css)).await.unwrap_or_else(|e| panic!("{css}: {e}"));
        for (name, value) in fields {
            form.set_by_name(name, value).await.unwrap_or_else(|e| panic!("{css} {name}: {e}"));
        }
        let button = format!("{css} button");
        let button = self.client.find(fantoccini::Locator::Css(&button)).await.expect("button");
        button.click().await.expect("click");
        self.left(&button).await
    }

    async fn click_link(&self, text: &str) -> String {
        let link = self.client.find(fantoccini::Locator::LinkText(text)).await;
        let link = link.unwrap_or_else(|e| panic!("no link {text:?}: {e}"));
        link.click().await.expect("click");
        self.left(&link).await
    }

    /// Waits until the page that held `clicked` has been replaced; the new page's source.
    async fn left(&self, clicked: &fantoccini::elements::Element) -> String {
        for _ in 0..200 {
            if clicked.tag_name().await.is_err() {
                return self.source().await;
            }
            tokio::time::sleep(std::time::Duration::from_millis(50)).await;
        }
        panic!("the click led nowhere");
    }

    /// A screenshot of the window into target/tmp/screenshots/NAME.png.
    async fn shot(&self, name: &str) {
        let png = self.client.screenshot().await.expect("screenshot");
        assert!(png.len() > 10_000, "{name}: screenshot of {} bytes", png.len());
        let file = self.shots.join(format!("{name}.png"));
        std::fs::write(&file, &png).expect("write screenshot");
        eprintln!("dashboard {name}: screenshot {} ({} bytes)", file.display(), png.len());
    }

    async fn close(mut self) {
        let _ = self.client.close().await;
        let _ = self.driver.kill();
        let _ = self.driver.wait();
    }
}

/// Waits until the job at `path` (a status endpoint) has finished, and returns it.
async fn finished(t: &TestService, path: &str) -> Value {
    for _ in 0..3000 {
        let j: Value = t
            .http
            .get(format!("{}{path}", t.url()))
            .bearer_auth(TOKEN)
            .send()
            .await
            .expect("get")
            .json()
            .await
            .expect("json");
        if j["state"] == "done" || j["state"] == "failed" {
            assert_eq!(j["state"], "done", "{j}");
            return j;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    panic!("{path} did not finish");
}

/// The newest analysis job of `kind`.
async fn newest_analysis(t: &TestService, kind: &str) -> String {
    sqlx::query_scalar("SELECT job_id FROM analysis_jobs WHERE kind = $1 ORDER BY created_at DESC, job_id DESC LIMIT 1")
        .bind(kind)
        .fetch_one(t.svc.store.pool())
        .await
        .expect("newest job")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn dashboard_pages_and_actions_in_a_real_browser() {
    // The worker serves Chapel Row only, so a job on Millpond stays queued until it is cancelled.
    let t = spawn_service_with(|c| c.job_feeders = Some(vec!["QM-CHAPEL-ROW".into()])).await;
    let work = tempfile::tempdir().expect("tempdir");
    let mut opts = SimulateOptions::new(t.url(), work.path().join("outboxes"));
    opts.operator_token = Some(TOKEN.into());
    opts.meters = 48;
    opts.days = 4;
    let report = simulate::run(&opts).await.expect("simulation");
    let (from, to) = (report.first_day, report.first_day + 4 * 86_400);
    let (_, b) = t
        .post_json("/v1/recoveries", &json!({"feeder_id": "QM-CHAPEL-ROW", "from": from, "to": to, "rank": 5}), true)
        .await;
    let rec = b["job_id"].as_str().expect("id").to_owned();
    finished(&t, &format!("/v1/recoveries/{rec}")).await;
    let (_, b) = t.post_json("/v1/clusterings", &json!({"recovery_jobs": [rec], "clusters": 3}), true).await;
    let clu = b["job_id"].as_str().expect("id").to_owned();
    finished(&t, &format!("/v1/analyses/{clu}")).await;
    let (_, b) =
        t.post_json("/v1/audits", &json!({"recovery_job": rec, "captured": ["QM-CHAPEL-ROW-0001"]}), true).await;
    let aud = b["job_id"].as_str().expect("id").to_owned();
    finished(&t, &format!("/v1/analyses/{aud}")).await;

    // Without a session the dashboard sends the browser to the sign-in page.
    let plain = reqwest::Client::builder().redirect(reqwest::redirect::Policy::none()).build().expect("client");
    let r = plain.get(format!("{}/dashboard", t.url())).send().await.expect("get");
    assert!(r.status().is_redirection() && r.headers()["location"] == "/dashboard/login", "{:?}", r.status());
    let (s, _) = t.post_json("/v1/dashboard/links", &json!({}), false).await;
    assert_eq!(s, StatusCode::UNAUTHORIZED, "links need the operator token");

    let web = Browser::start(t.url()).await;
    let login = web.open("/dashboard").await;
    assert_eq!(web.at().await, "/dashboard/login");
    assert!(login.contains("Your name") && login.contains("Operator token"), "{login}");
    web.shot("sign-in").await;
    let (s, b) = t.post_json("/v1/dashboard/links", &json!({"who": "wren on duty"}), true).await;
    assert_eq!(s, StatusCode::OK, "{b}");
    let link = b["url"].as_str().expect("url").to_owned();
    let home = web.open(&link).await;
    assert_eq!(web.at().await, "/dashboard");
    // The audited feeder's row shows the audit's F1 and, without targets, says so.
    let f1 = t.svc.store.analysis(&aud).await.expect("audit").and_then(|a| a.result).expect("result")["strongest"]
        ["event_f1"]
        .as_f64()
        .expect("f1");
    assert!(home.contains(&format!("event F1 {f1:.2}")) && home.contains("– no targets set"), "{home}");
    web.shot("overview").await;
    let r = plain.get(format!("{}{link}", t.url())).send().await.expect("get");
    assert_eq!(r.status().as_u16(), 401, "a used link signed in again");

    // A forged targets form (a token that is not the session's) is refused and changes nothing.
    let forged =
        [("csrf", "0".repeat(64)), ("event_f1_max", "0.5".into()), ("daily_energy_error_max_percent", "9".into())];
    let forged: Vec<(&str, &str)> = forged.iter().map(|(k, v)| (*k, v.as_str())).collect();
    let refused = web.submit("/dashboard/actions/targets/QM-CHAPEL-ROW", &forged).await;
    assert!(refused.contains("Refused: "), "{refused}");
    assert_eq!(t.count("SELECT COUNT(*) FROM feeder_targets").await, 0, "a forged form stored targets");
    web.open("/dashboard").await;
    let bad = web
        .submit(
            "/dashboard/actions/targets/QM-CHAPEL-ROW",
            &[("event_f1_max", "most"), ("daily_energy_error_max_percent", "60")],
        )
        .await;
    assert!(bad.contains("Not set: event_f1_max"), "{bad}");
    assert_eq!(t.count("SELECT COUNT(*) FROM feeder_targets").await, 0, "a bad form stored targets");
    web.open("/dashboard").await;
    let home = web
        .submit(
            "/dashboard/actions/targets/QM-CHAPEL-ROW",
            &[("event_f1_max", "1"), ("daily_energy_error_max_percent", "60")],
        )
        .await;
    assert!(home.contains("✓ meets both targets"), "{home}");

    // The feeder page: profile history, the trade-off chart, the audit.
    let feeder = web.click_link("QM-CHAPEL-ROW").await;
    assert_eq!(web.at().await, "/dashboard/feeders/QM-CHAPEL-ROW");
    for expect in
        ["Profile history", "v1 (current)", "operator (HTTP API)", "<svg", aud.as_str(), "audits of profile v1"]
    {
        assert!(feeder.contains(expect), "feeder page lacks {expect:?}");
    }
    web.shot("feeder").await;
    analyses_from_the_feeder_page(&t, &web).await;

    // Publishing the calibration's recommendation after its confirmation.
    let cal = newest_analysis(&t, "calibrate").await;
    web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    let confirm = web.click_link("review and publish").await;
    assert!(confirm.contains("Publish as the next profile version"), "{confirm}");
    web.shot("publish").await;
    let home = web.submit(&format!("/dashboard/actions/publish/{cal}"), &[]).await;
    assert!(home.contains("published as version 2"), "{home}");
    let feeder = web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    assert!(feeder.contains("v2 (current)"), "{feeder}");
    assert!(feeder.contains(&format!("wren on duty (dashboard), from calibration {cal}")), "{feeder}");
    web.shot("feeder-published").await;

    // The other pages.
    let pages = [
        ("meter", format!("/dashboard/recoveries/{rec}?meter_id=QM-CHAPEL-ROW-0002&span=day"), "QM-CHAPEL-ROW-0002"),
        ("clusters", format!("/dashboard/clusterings/{clu}"), "hour of the local day (Europe/London)"),
        ("audit", format!("/dashboard/analyses/{aud}"), "In plain words"),
        ("calibration", format!("/dashboard/analyses/{cal}"), "Recommended profile"),
    ];
    for (name, path, expect) in pages {
        let html = web.open(&path).await;
        assert!(html.contains(expect) && html.contains("<svg"), "{name}: page lacks {expect:?}");
        web.shot(name).await;
    }
    jobs_from_the_browser(&t, &web, from).await;
    web.close().await;
    let mut actions: Vec<(String, String)> = sqlx::query_as("SELECT operator_name, action FROM dashboard_actions")
        .fetch_all(t.svc.store.pool())
        .await
        .expect("log");
    actions.sort();
    let expected =
        ["cancel job", "publish recommendation", "set targets", "start audit", "start calibration", "start recovery"];
    assert_eq!(actions, expected.map(|a| ("wren on duty".to_owned(), a.to_owned())));
    jobs_page_filters_and_refuses_bad_input(&t, &plain, &rec, &aud).await;
}

/// From the feeder page: an audit refused for a meter of no feeder (nothing
/// stored), then an audit and a calibration started and finished.
async fn analyses_from_the_feeder_page(t: &TestService, web: &Browser) {
    let before = t.count("SELECT COUNT(*) FROM analysis_jobs").await;
    let bad = web.submit("/dashboard/actions/audit", &[("captured", "QM-NOWHERE-0001")]).await;
    assert!(bad.contains("Not started: captured"), "{bad}");
    assert_eq!(t.count("SELECT COUNT(*) FROM analysis_jobs").await, before, "a refused audit was stored");
    web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    let page = web.submit("/dashboard/actions/audit", &[("captured", "QM-CHAPEL-ROW-0003")]).await;
    assert_eq!(web.at().await, "/dashboard/feeders/QM-CHAPEL-ROW", "{page}");
    let audit = newest_analysis(t, "audit").await;
    finished(t, &format!("/v1/analyses/{audit}")).await;
    web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    let before = t.count("SELECT COUNT(*) FROM analysis_jobs").await;
    let bad = web
        .submit("/dashboard/actions/calibrate", &[("event_f1_max", "most"), ("daily_energy_error_max_percent", "60")])
        .await;
    assert!(bad.contains("Not started: event_f1_max"), "{bad}");
    assert_eq!(t.count("SELECT COUNT(*) FROM analysis_jobs").await, before, "a refused calibration was stored");
    web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    let page = web
        .submit("/dashboard/actions/calibrate", &[("event_f1_max", "1"), ("daily_energy_error_max_percent", "60")])
        .await;
    assert_eq!(web.at().await, "/dashboard/feeders/QM-CHAPEL-ROW", "{page}");
    let cal = newest_analysis(t, "calibrate").await;
    finished(t, &format!("/v1/analyses/{cal}")).await;
    let page = web.open("/dashboard/feeders/QM-CHAPEL-ROW").await;
    assert!(page.contains(&audit) && page.contains(&cal) && page.contains("wren on duty"), "{page}");
}

/// From the jobs page: a recovery on Millpond started (it stays queued: the
/// worker serves Chapel Row only) and cancelled.
async fn jobs_from_the_browser(t: &TestService, web: &Browser, from: i64) {
    web.open("/dashboard/jobs").await;
    let day = |t: i64| chrono::DateTime::from_timestamp(t, 0).expect("day").format("%Y-%m-%d").to_string();
    let fields = [("feeder_id", "QM-MILLPOND".to_owned()), ("from", day(from)), ("to", day(from + 2 * 86_400))];
    let fields: Vec<(&str, &str)> = fields.iter().map(|(k, v)| (*k, v.as_str())).collect();
    let jobs = web.submit("/dashboard/actions/recover", &fields).await;
    assert_eq!(web.at().await, "/dashboard/jobs", "{jobs}");
    let id: String = sqlx::query_scalar("SELECT job_id FROM recovery_jobs WHERE feeder_id = 'QM-MILLPOND'")
        .fetch_one(t.svc.store.pool())
        .await
        .expect("queued recovery");
    assert!(jobs.contains(&format!("Cancel {id}")), "{jobs}");
    web.shot("jobs").await;
    let jobs = web.submit(&format!("/dashboard/actions/cancel/{id}"), &[]).await;
    assert!(jobs.contains("cancelled by the operator"), "{jobs}");
}

/// The jobs page: filtered by kind, with feeder, window, times and duration;
/// a bad filter gets the form back with the field named.
async fn jobs_page_filters_and_refuses_bad_input(t: &TestService, plain: &reqwest::Client, rec: &str, aud: &str) {
    let (_, b) = t.post_json("/v1/dashboard/links", &json!({}), true).await;
    let r = plain.get(format!("{}{}", t.url(), b["url"].as_str().expect("url"))).send().await.expect("enter");
    let cookie = r.headers()["set-cookie"].to_str().expect("cookie").split(';').next().expect("pair").to_owned();
    let get = |q: &str| {
        let (plain, cookie, url) = (plain.clone(), cookie.clone(), format!("{}/dashboard/jobs{q}", t.url()));
        async move {
            let r = plain.get(url).header("cookie", cookie).send().await.expect("get");
            (r.status().as_u16(), r.text().await.expect("text"))
        }
    };
    let (s, page) = get("?kind=recover").await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains(rec) && !page.contains(aud), "{page}");
    assert!(page.contains("QM-CHAPEL-ROW") && page.contains(" UTC") && page.contains("2 jobs; page 1 of 1"), "{page}");
    let (s, page) = get("").await;
    assert!(s == 200 && page.contains(rec) && page.contains(aud) && page.contains("6 jobs"), "{page}");
    // The meter view: a day in local time with UTC beside it, the meter list searched, a bad span refused.
    let view = |q: String| {
        let (plain, cookie, url) =
            (plain.clone(), cookie.clone(), format!("{}/dashboard/recoveries/{rec}{q}", t.url()));
        async move {
            let r = plain.get(url).header("cookie", cookie).send().await.expect("get");
            (r.status().as_u16(), r.text().await.expect("text"))
        }
    };
    let (s, page) = view("?meter_id=QM-CHAPEL-ROW-0002&span=day&start_day=1&q=0002".into()).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains(" UTC)") && page.contains("1 of 12 meters match") && page.contains("<svg"), "{page}");
    let (s, page) = view("?span=month".into()).await;
    assert!(s == 400 && page.contains("Not shown: span"), "{page}");
    // A group's load charted with its band; an unknown group is named.
    let members = json!({"meters": ["QM-CHAPEL-ROW-0001", "QM-CHAPEL-ROW-0002", "QM-CHAPEL-ROW-0003"]});
    let r = t.http.put(format!("{}/v1/groups/lane-end", t.url())).bearer_auth(TOKEN).json(&members).send().await;
    assert_eq!(r.expect("put").status().as_u16(), 200);
    let (s, page) = view("/groups?name=lane-end".into()).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains("Group lane-end: 3 meters") && page.contains("<svg") && page.contains("95% band"), "{page}");
    assert!(page.contains("3 of the group's 3 meters are on this feeder") && page.contains(" UTC)"), "{page}");
    let (s, page) = view("/groups?name=nowhere".into()).await;
    assert!(s == 400 && page.contains("Not shown: name") && page.contains("no group nowhere"), "{page}");
    for (q, field) in
        [("?kind=sweep", "kind"), ("?feeder=QM-NOWHERE", "feeder"), ("?state=lost", "state"), ("?page=0", "page")]
    {
        let (s, page) = get(q).await;
        assert_eq!(s, 400, "{q}: {page}");
        assert!(page.contains(&format!("Not shown: {field}")) && page.contains("<form"), "{q}: {page}");
    }
}

/// Starting a recovery and cancelling a job from the dashboard: a form without
/// the session's token is refused with 403 and changes nothing; bad input gets
/// the form back naming the field, with nothing stored; a good form queues the
/// job and records the action.
#[tokio::test]
async fn dashboard_actions_need_their_form_token() {
    // No worker: the queued job stays queued until it is cancelled.
    let t = spawn_service_with(|c| c.run_worker = false).await;
    small_feeder(&t).await;
    let plain = &reqwest::Client::builder().redirect(reqwest::redirect::Policy::none()).build().expect("client");
    let (_, b) = t.post_json("/v1/dashboard/links", &json!({}), true).await;
    let r = plain.get(format!("{}{}", t.url(), b["url"].as_str().expect("url"))).send().await.expect("enter");
    let cookie = r.headers()["set-cookie"].to_str().expect("cookie").split(';').next().expect("pair").to_owned();
    let cookie = cookie.as_str();
    let post = |path: &str, form: String| {
        let (plain, cookie, url) = (plain.clone(), cookie.to_owned(), format!("{}{path}", t.url()));
        async move {
            let r = plain
                .post(url)
                .header("cookie", cookie)
                .header("content-type", "application/x-www-form-urlencoded")
                .body(form)
                .send()
                .await
                .expect("post");
            (r.status().as_u16(), r.text().await.expect("text"))
        }
    };
    let page = plain
        .get(format!("{}/dashboard/jobs", t.url()))
        .header("cookie", cookie)
        .send()
        .await
        .expect("get")
        .text()
        .await
        .expect("text");
    let csrf = page.split("name=\"csrf\" value=\"").nth(1).and_then(|r| r.split('"').next()).expect("form token");
    let before = t.count("SELECT COUNT(*) FROM recovery_jobs").await;
    let good = "feeder_id=F1&from=2023-01-09&to=2023-01-11&rank=auto";
    // A forged form (no token, or another token) changes nothing.
    for form in [good.to_owned(), format!("csrf={}&{good}", "0".repeat(64))] {
        let (s, body) = post("/dashboard/actions/recover", form).await;
        assert_eq!(s, 403, "{body}");
    }
    assert_eq!(t.count("SELECT COUNT(*) FROM recovery_jobs").await, before, "a forged form queued a job");
    for (form, field) in [
        ("feeder_id=F1&from=2023-01-11&to=2023-01-09&rank=auto", "to"),
        ("feeder_id=QM-NOWHERE&from=2023-01-09&to=2023-01-11&rank=auto", "feeder_id"),
        ("feeder_id=F1&from=soon&to=2023-01-11&rank=auto", "from"),
        ("feeder_id=F1&from=2023-01-09&to=2023-01-11&rank=many", "rank"),
    ] {
        let (s, body) = post("/dashboard/actions/recover", format!("csrf={csrf}&{form}")).await;
        assert_eq!(s, 400, "{form}: {body}");
        assert!(body.contains(&format!("Not started: {field}")), "{form}: {body}");
    }
    assert_eq!(t.count("SELECT COUNT(*) FROM recovery_jobs").await, before, "bad input stored a job");
    let (s, body) = post("/dashboard/actions/recover", format!("csrf={csrf}&{good}")).await;
    assert_eq!(s, 303, "{body}");
    assert_eq!(t.count("SELECT COUNT(*) FROM recovery_jobs").await, before + 1);
    let pool = t.svc.store.pool();
    let id: String = sqlx::query_scalar("SELECT job_id FROM recovery_jobs ORDER BY created_at DESC, job_id LIMIT 1")
        .fetch_one(pool)
        .await
        .expect("new job");
    let (s, body) = post(&format!("/dashboard/actions/cancel/{id}"), String::new()).await;
    assert_eq!(s, 403, "a cancel without its token: {body}");
    let (s, body) = post(&format!("/dashboard/actions/cancel/{id}"), format!("csrf={csrf}")).await;
    assert_eq!(s, 303, "{body}");
    let error: Option<String> = sqlx::query_scalar("SELECT error FROM recovery_jobs WHERE job_id = $1")
        .bind(&id)
        .fetch_one(pool)
        .await
        .expect("job");
    assert_eq!(error.as_deref(), Some("cancelled by the operator"));
    // Audits and calibrations: forged forms are refused before anything is read; a
    // recovery that is not the feeder's is named; an unknown feeder's page is 404.
    for action in ["audit", "calibrate"] {
        let form = "feeder_id=F1&recovery_job=rec-none&captured=M1&event_f1_max=0.5&daily_energy_error_max_percent=5";
        let (s, body) = post(&format!("/dashboard/actions/{action}"), form.into()).await;
        assert_eq!(s, 403, "{action} without its token: {body}");
        let (s, body) = post(&format!("/dashboard/actions/{action}"), format!("csrf={csrf}&{form}")).await;
        assert!(s == 400 && body.contains("Not started: recovery_job"), "{action}: {body}");
    }
    assert_eq!(t.count("SELECT COUNT(*) FROM analysis_jobs").await, 0, "a refused analysis was stored");
    let r = plain.get(format!("{}/dashboard/feeders/QM-NOWHERE", t.url())).header("cookie", cookie).send().await;
    assert_eq!(r.expect("get").status().as_u16(), 404);
    // Targets: forged, then bad, then good.
    let (s, body) =
        post("/dashboard/actions/targets/F1", "event_f1_max=0.5&daily_energy_error_max_percent=10".into()).await;
    assert_eq!(s, 403, "{body}");
    for (form, field) in [
        ("event_f1_max=abc&daily_energy_error_max_percent=10", "event_f1_max"),
        ("event_f1_max=1.5&daily_energy_error_max_percent=10", "event_f1_max"),
        ("event_f1_max=0.5&daily_energy_error_max_percent=500", "daily_energy_error_max_percent"),
    ] {
        let (s, body) = post("/dashboard/actions/targets/F1", format!("csrf={csrf}&{form}")).await;
        assert_eq!(s, 400, "{form}: {body}");
        assert!(body.contains(&format!("Not set: {field}")), "{form}: {body}");
    }
    let (s, body) = post(
        "/dashboard/actions/targets/F9",
        format!("csrf={csrf}&event_f1_max=0.5&daily_energy_error_max_percent=10"),
    )
    .await;
    assert!(s == 400 && body.contains("Not set: feeder_id"), "{body}");
    assert_eq!(t.count("SELECT COUNT(*) FROM feeder_targets").await, 0, "bad targets were stored");
    let (s, body) = post(
        "/dashboard/actions/targets/F1",
        format!("csrf={csrf}&event_f1_max=0.5&daily_energy_error_max_percent=10"),
    )
    .await;
    assert_eq!(s, 303, "{body}");
    let home = plain.get(format!("{}/dashboard", t.url())).header("cookie", cookie).send().await.expect("get");
    let home = home.text().await.expect("text");
    assert!(
        home.contains("value=\"0.50\"") && home.contains("value=\"10.0\"") && home.contains("– not audited yet"),
        "{home}"
    );
    // Publishing: two finished calibrations as a worker would store them, one
    // that met its targets and one that did not.
    for (id, meets) in [("cal-meets", true), ("cal-misses", false)] {
        let point = json!({"register_period": "daily", "levels": 3, "boundaries_kw": [1.0, 2.0], "scale_kw": 1.1,
            "attacker_event_f1": 0.45, "attacker_strategy": "event_posterior", "utility_daily_energy_error": 0.02,
            "utility_nrmse": 0.5});
        let result = json!({"meets_targets": meets, "message": "test calibration", "feeder_id": "F1",
            "recommended": {"noise": "gaussian", "scale_kw": 1.1, "boundaries_kw": [1.0, 2.0], "interval_s": 900,
                "send_registers": true},
            "chosen": point, "targets": {"event_f1_max": 0.6, "captured": 1, "daily_energy_error_max": 0.1},
            "curve": [point], "evaluations": 1, "published_version": null});
        sqlx::query(
            "INSERT INTO analysis_jobs (job_id, kind, feeder_id, params, state, created_at, finished_at, result)
             VALUES ($1, 'calibrate', 'F1', '{}', 'done', $2, $2, $3)",
        )
        .bind(id)
        .bind(now_s())
        .bind(result.to_string())
        .execute(pool)
        .await
        .expect("calibration row");
    }
    let versions = || t.count("SELECT COUNT(*) FROM dither_profiles WHERE feeder_id = 'F1'");
    let before = versions().await;
    let home = plain.get(format!("{}/dashboard", t.url())).header("cookie", cookie).send().await.expect("get");
    let home = home.text().await.expect("text");
    assert!(!home.contains("/dashboard/publish/cal-misses"), "a recommendation that missed is offered: {home}");
    let confirm = plain.get(format!("{}/dashboard/publish/cal-meets", t.url())).header("cookie", cookie).send().await;
    let confirm = confirm.expect("get").text().await.expect("text");
    assert!(
        confirm.contains("0.45 (target ≤ 0.60)") && confirm.contains("Publish as the next profile version"),
        "{confirm}"
    );
    let (s, body) = post("/dashboard/actions/publish/cal-meets", String::new()).await;
    assert_eq!(s, 403, "a publish without its token: {body}");
    let (s, body) = post("/dashboard/actions/publish/cal-misses", format!("csrf={csrf}")).await;
    assert!(s == 400 && body.contains("Not published: meets_targets"), "{body}");
    assert_eq!(versions().await, before, "a refused publish stored a profile");
    let (s, body) = post("/dashboard/actions/publish/cal-meets", format!("csrf={csrf}")).await;
    assert_eq!(s, 303, "{body}");
    assert_eq!(versions().await, before + 1, "publishing creates the next profile version");
    let (s, body) = post("/dashboard/actions/publish/cal-meets", format!("csrf={csrf}")).await;
    assert!(s == 400 && body.contains("published before"), "{body}");
    assert_eq!(versions().await, before + 1);
    let mut actions: Vec<String> =
        sqlx::query_scalar("SELECT action FROM dashboard_actions").fetch_all(pool).await.expect("actions");
    actions.sort();
    assert_eq!(actions, ["cancel job", "publish recommendation", "set targets", "start recovery"]);
}

/// Nothing of a refused upload is stored: no reading, no batch, no sequence number.
async fn nothing_stored(t: &TestService) {
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 0, "nothing stored");
    assert_eq!(t.count("SELECT COUNT(*) FROM register_advances").await, 0, "no register advance stored");
    assert_eq!(t.count("SELECT COUNT(*) FROM ingest_batches").await, 0, "no batch recorded");
    assert_eq!(t.count("SELECT COUNT(*) FROM gateway_sequences").await, 0, "no sequence recorded");
}

fn refused(s: StatusCode, body: &Value, status: StatusCode, field: &str, reason_part: &str) {
    assert_eq!(s, status, "{body}");
    assert_eq!(body["field"], field, "{body}");
    assert!(body["reason"].as_str().unwrap_or("").contains(reason_part), "{body}");
}

#[tokio::test]
async fn unsigned_forged_stale_reused_and_foreign_uploads_are_refused() {
    let t = spawn_service_with(|c| {
        c.gateway_burst = 12.0;
        c.gateway_batches_per_s = 0.01;
    })
    .await;
    small_feeder(&t).await;
    let key = t.gw_key.lock().expect("key").clone();
    let body = batch("b1", vec![good_reading(aligned_past(3))]).to_string();
    let b = body.as_bytes();

    // No signature at all.
    let (s, r) = t.post_json("/v1/ingest/batches", &batch("b1", vec![good_reading(aligned_past(3))]), false).await;
    refused(s, &r, StatusCode::UNAUTHORIZED, "x-meterveil-gateway", "is missing");
    // Unknown gateway.
    let (s, r) = t.post_signed(b, "gw-nobody", 1, now_s(), &key).await;
    refused(s, &r, StatusCode::UNAUTHORIZED, "x-meterveil-gateway", "not provisioned");
    // Wrong key.
    let (s, r) = t.post_signed(b, "gw-1", 1, now_s(), b"not-the-key-of-gw-1-0123456789").await;
    refused(s, &r, StatusCode::UNAUTHORIZED, "x-meterveil-signature", "does not match");
    // A body altered after signing.
    {
        use meterveil_shared::auth::*;
        let text = signing_text("POST", "/v1/ingest/batches", "gw-1", 1, now_s(), &body_sha256(b));
        let altered = body.replace("\"level\":1", "\"level\":2");
        let resp = t
            .http
            .post(format!("{}/v1/ingest/batches", t.url()))
            .header(HEADER_GATEWAY, "gw-1")
            .header(HEADER_SEQUENCE, "1")
            .header(HEADER_TIMESTAMP, now_s().to_string())
            .header(HEADER_SIGNATURE, sign(&key, &text))
            .body(altered)
            .send()
            .await
            .expect("send");
        assert_eq!(resp.status().as_u16(), 401);
    }
    // A timestamp six minutes off: the message tells the service's time.
    let (s, r) = t.post_signed(b, "gw-1", 1, now_s() - 360, &key).await;
    refused(s, &r, StatusCode::UNAUTHORIZED, "x-meterveil-timestamp", "from the service's clock");
    assert!(r["reason"].as_str().unwrap_or("").contains(&(now_s() / 100).to_string()), "{r}");
    // A feeder the gateway does not serve, and a meter of another feeder.
    assert_eq!(t.post_json("/v1/feeders", &json!({"feeder_id": "F2"}), true).await.0, StatusCode::CREATED);
    assert_eq!(t.post_json("/v1/feeders/F2/meters", &json!({"meter_ids": ["x9"]}), true).await.0, StatusCode::OK);
    let other_feeder =
        json!({"batch_id": "b2", "gateway_id": "gw-1", "feeder_id": "F2", "readings": [good_reading(aligned_past(3))]});
    let (s, r) = t.post_signed(other_feeder.to_string().as_bytes(), "gw-1", 1, now_s(), &key).await;
    refused(s, &r, StatusCode::FORBIDDEN, "feeder_id", "serves feeder F1");
    let foreign_meter = batch(
        "b3",
        vec![json!({"meter_id": "x9", "interval_start": aligned_past(3), "level": 1, "profile_version": 1})],
    );
    let (s, r) = t.post_signed(foreign_meter.to_string().as_bytes(), "gw-1", 1, now_s(), &key).await;
    refused(s, &r, StatusCode::FORBIDDEN, "meter_id", "on feeder F2");
    // A batch naming another gateway than the one that signed it.
    let impostor =
        json!({"batch_id": "b4", "gateway_id": "gw-2", "feeder_id": "F1", "readings": [good_reading(aligned_past(3))]});
    let (s, r) = t.post_signed(impostor.to_string().as_bytes(), "gw-1", 1, now_s(), &key).await;
    refused(s, &r, StatusCode::FORBIDDEN, "gateway_id", "signed by gw-1");
    nothing_stored(&t).await;

    // Accepted once; the same upload again is answered with the same acknowledgement.
    let (s, first) = t.post_signed(b, "gw-1", 5, now_s(), &key).await;
    assert_eq!(s, StatusCode::OK, "{first}");
    let (s, again) = t.post_signed(b, "gw-1", 5, now_s(), &key).await;
    assert_eq!((s, &again), (StatusCode::OK, &first));
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 1);
    // Sequence 5 with another body; and a fresh body under an old number.
    let other = batch("b5", vec![good_reading(aligned_past(4))]).to_string();
    let (s, r) = t.post_signed(other.as_bytes(), "gw-1", 5, now_s(), &key).await;
    refused(s, &r, StatusCode::CONFLICT, "x-meterveil-sequence", "already used with another body");
    let (s, r) = t.post_signed(other.as_bytes(), "gw-1", 4, now_s(), &key).await;
    refused(s, &r, StatusCode::CONFLICT, "x-meterveil-sequence", "not above");
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 1, "the refused uploads stored nothing");
    assert_eq!(t.count("SELECT COUNT(*) FROM gateway_sequences").await, 1);

    // Over the rate: the burst of 12 is spent, and Retry-After says when to come back.
    let mut limited = None;
    for i in 0..12 {
        let (s, r) = t.post_signed(other.as_bytes(), "gw-1", 100 + i, now_s(), &key).await;
        if s == StatusCode::TOO_MANY_REQUESTS {
            limited = Some(r);
            break;
        }
    }
    let r = limited.expect("the rate limit answered 429");
    refused(
        StatusCode::TOO_MANY_REQUESTS,
        &r,
        StatusCode::TOO_MANY_REQUESTS,
        "x-meterveil-gateway",
        "over its upload rate",
    );
    assert!(r["retry_after_header"].as_str().and_then(|v| v.parse::<u64>().ok()).is_some_and(|v| v >= 1), "{r}");

    // Rotating the key locks the old one out.
    let new_key = t.provision("gw-1", "F1").await;
    assert_ne!(new_key, key);
    let (s, r) = t.post_signed(other.as_bytes(), "gw-1", 200, now_s(), &key).await;
    refused(s, &r, StatusCode::UNAUTHORIZED, "x-meterveil-signature", "does not match");
}

/// One wave of uploads sent at once, each `(gateway, key, sequence, body)`; the
/// answers in the same order.
async fn upload_wave(t: &TestService, wave: Vec<(String, Vec<u8>, u64, String)>) -> Vec<(StatusCode, Value)> {
    let tasks: Vec<_> = wave
        .into_iter()
        .map(|(gw, key, seq, body)| {
            tokio::spawn(signed_upload(t.http.clone(), t.url(), body.into_bytes(), gw, seq, now_s(), key))
        })
        .collect();
    let mut out = Vec::new();
    for task in tasks {
        out.push(task.await.expect("upload task"));
    }
    out
}

/// A counter from the service's /metrics page.
async fn metric(t: &TestService, name: &str) -> u64 {
    let text = t.http.get(format!("{}/metrics", t.url())).send().await.expect("metrics").text().await.expect("text");
    text.lines()
        .find_map(|l| l.strip_prefix(name).and_then(|rest| rest.trim().parse().ok()))
        .unwrap_or_else(|| panic!("{name} missing from /metrics:\n{text}"))
}

/// Uploads that arrive together are checked and written as one group (the
/// service lingers 400 ms for them here), yet each gets exactly the answer it
/// would get alone: its own stored and duplicate counts, a replay its first
/// acknowledgement, a reused sequence number or batch id a 409, a bad row a 422
/// that stores nothing. A group holding readings stored before is rolled back and
/// settled upload by upload. A retry racing its original gets the same answer.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn uploads_committed_together_get_the_answers_they_would_get_alone() {
    let t = spawn_service_with(|c| c.ingest_group_linger = std::time::Duration::from_millis(400)).await;
    small_feeder(&t).await;
    let meters: Vec<String> = (0..12).map(|i| format!("gm{i:02}")).collect();
    let (s, r) = t.post_json("/v1/feeders/F1/meters", &json!({ "meter_ids": meters }), true).await;
    assert_eq!(s, StatusCode::OK, "{r}");
    let mut keys = Vec::new();
    for i in 0..12 {
        keys.push(t.provision(&format!("gw-g{i:02}"), "F1").await);
    }
    let first = aligned_past(200);
    // `n` readings of meter gm{i} from interval `from` on (counted from `first`).
    let readings = |i: usize, from: i64, n: i64, level: u8| -> Vec<Value> {
        (from..from + n)
            .map(|k| json!({"meter_id": format!("gm{i:02}"), "interval_start": first + 900 * k, "level": level, "profile_version": 1}))
            .collect()
    };
    let body = |gw: usize, id: &str, rows: Vec<Value>| {
        json!({"batch_id": id, "gateway_id": format!("gw-g{gw:02}"), "feeder_id": "F1", "readings": rows}).to_string()
    };
    let up = |gw: usize, seq: u64, body: String| (format!("gw-g{gw:02}"), keys[gw].clone(), seq, body);

    // Wave 1: each gateway a day of new readings.
    let wave1: Vec<_> = (0..12).map(|i| up(i, 1, body(i, &format!("w1-{i}"), readings(i, 0, 96, 1)))).collect();
    let answers1 = upload_wave(&t, wave1.clone()).await;
    for (i, (s, a)) in answers1.iter().enumerate() {
        assert_eq!(*s, StatusCode::OK, "gateway {i}: {a}");
        assert_eq!((a["stored_readings"].as_u64(), a["duplicate_readings"].as_u64()), (Some(96), Some(0)), "{a}");
    }
    let groups1 = metric(&t, "meterveil_ingest_groups_total").await;
    assert!(groups1 <= 6, "12 uploads sent together took {groups1} group commits");
    assert_eq!(metric(&t, "meterveil_ingest_group_retries_total").await, 0);

    // Wave 2, sent together.
    let mut wave2: Vec<_> = (0..4).map(|i| up(i, 2, body(i, &format!("w2-{i}"), readings(i, 48, 96, 2)))).collect();
    wave2.push(wave1[4].clone()); // a replay
    wave2.push(wave1[5].clone()); // a replay
    wave2.push(up(6, 1, body(6, "w2-6", readings(6, 96, 4, 1)))); // sequence 1 again, another body
    wave2.push(up(7, 2, body(7, "w2-7", readings(7, 96, 4, 9)))); // level 9 of 3
    let retried = up(8, 2, body(8, "w2-8", readings(8, 96, 10, 0))); // a retry racing its original
    wave2.push(retried.clone());
    wave2.push(retried);
    wave2.push(up(9, 2, body(9, "shared-id", readings(9, 96, 10, 0)))); // one batch id, two bodies
    wave2.push(up(10, 2, body(10, "shared-id", readings(10, 96, 10, 0))));
    let a = upload_wave(&t, wave2).await;
    for (i, (s, r)) in a[..4].iter().enumerate() {
        assert_eq!(*s, StatusCode::OK, "gateway {i}: {r}");
        assert_eq!((r["stored_readings"].as_u64(), r["duplicate_readings"].as_u64()), (Some(48), Some(48)), "{r}");
    }
    assert_eq!(a[4], answers1[4], "a replay gets the first acknowledgement");
    assert_eq!(a[5], answers1[5]);
    refused(a[6].0, &a[6].1, StatusCode::CONFLICT, "x-meterveil-sequence", "already used with another body");
    refused(a[7].0, &a[7].1, StatusCode::UNPROCESSABLE_ENTITY, "readings[0].level", "out of range");
    assert_eq!((a[8].0, a[8].1["stored_readings"].as_u64()), (StatusCode::OK, Some(10)), "{}", a[8].1);
    assert_eq!(a[8], a[9], "both copies get the one acknowledgement");
    let (won, lost) = if a[10].0 == StatusCode::OK { (&a[10], &a[11]) } else { (&a[11], &a[10]) };
    assert_eq!(won.1["stored_readings"].as_u64(), Some(10), "{}", won.1);
    refused(lost.0, &lost.1, StatusCode::CONFLICT, "batch_id", "already stored with a different body");
    assert!(metric(&t, "meterveil_ingest_group_retries_total").await >= 1, "the duplicates forced a retry alone");

    // Stored: every row exactly once, and nothing of the refused uploads.
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 12 * 96 + 4 * 48 + 10 + 10);
    assert_eq!(t.count("SELECT COUNT(*) FROM readings WHERE batch_id IN ('w2-6', 'w2-7')").await, 0);
    assert_eq!(t.count("SELECT COUNT(*) FROM ingest_batches").await, 12 + 4 + 1 + 1);
    assert_eq!(t.count("SELECT COUNT(*) FROM gateway_sequences").await, 12 + 4 + 1 + 1);
    // Wave 1 left every gateway at sequence 1; wave 2 moved 0-3, 8 and the winner
    // of the shared id to 2.
    let sequences =
        t.count("SELECT CAST(COALESCE(SUM(last_sequence), 0) AS BIGINT) FROM gateways WHERE gateway_id LIKE 'gw-g%'");
    assert_eq!(sequences.await, 12 + 4 + 1 + 1);
}

/// Two services on one database (as two processes behind a load balancer would
/// be): copies of one upload racing through both are stored once, and every copy
/// gets the same acknowledgement. The loser's conditional writes find the
/// winner's rows and it answers from them.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn copies_racing_through_two_services_on_one_database_are_stored_once() {
    let dir = tempfile::tempdir().expect("tempdir");
    let url = test_database(dir.path()).await;
    let master = Secret::new("shared-master-key-of-both-services-0123456789");
    let config = || {
        let mut c = ServiceConfig::local(url.clone(), Secret::new(TOKEN));
        c.gateway_master_key = master.clone();
        c.run_worker = false;
        c
    };
    let t = TestService {
        svc: app::start(config()).await.expect("first service"),
        db: url.clone(),
        _dir: dir,
        http: reqwest::Client::new(),
        gw_key: Default::default(),
        seq: AtomicU64::new(0),
    };
    let second = app::start(config()).await.expect("second service");
    small_feeder(&t).await;
    let key = t.gw_key.lock().expect("key").clone();
    let rounds = 20;
    for round in 0..rounds {
        let rows: Vec<Value> = (0..8).map(|k| good_reading(aligned_past(300 - 8 * round - k))).collect();
        let body = batch(&format!("race-{round}"), rows).to_string().into_bytes();
        let tasks: Vec<_> = [t.url(), second.url(), t.url(), second.url()]
            .into_iter()
            .map(|to| {
                let upload = signed_upload(
                    t.http.clone(),
                    to,
                    body.clone(),
                    "gw-1".into(),
                    round as u64 + 1,
                    now_s(),
                    key.clone(),
                );
                tokio::spawn(upload)
            })
            .collect();
        let mut answers = Vec::new();
        for task in tasks {
            answers.push(task.await.expect("upload"));
        }
        assert_eq!(answers[0].0, StatusCode::OK, "round {round}: {}", answers[0].1);
        assert_eq!(answers[0].1["stored_readings"].as_u64(), Some(8), "round {round}: {}", answers[0].1);
        for a in &answers[1..] {
            assert_eq!(a, &answers[0], "round {round}: every copy gets the one acknowledgement");
        }
    }
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 8 * rounds);
    assert_eq!(t.count("SELECT COUNT(*) FROM ingest_batches").await, rounds);
    assert_eq!(t.count("SELECT COUNT(*) FROM gateway_sequences").await, rounds);
    let retries = t.svc.metrics.ingest_group_retries.get() + second.metrics.ingest_group_retries.get();
    // Measured: all 20 rounds raced on both backends (one group rolled back each).
    assert!(retries >= 1, "no copy raced another, so this run showed nothing");
    second.stop().await.expect("second service stops");
}

#[tokio::test]
async fn a_compressed_body_is_limited_after_decompression() {
    use std::io::Write;
    let t = spawn_service_with(|c| c.body_limit_bytes = 64 * 1024).await;
    small_feeder(&t).await;
    let key = t.gw_key.lock().expect("key").clone();
    let gzip = |b: &[u8]| {
        let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::best());
        e.write_all(b).expect("gzip");
        e.finish().expect("gzip")
    };
    let send = |plain: Vec<u8>, seq: u64| {
        let (http, url, key) = (t.http.clone(), t.url(), key.clone());
        async move {
            use meterveil_shared::auth::*;
            // The signature covers the decompressed body.
            // One timestamp for the signature and its header (two calls may straddle a second).
            let ts = now_s();
            let text = signing_text("POST", "/v1/ingest/batches", "gw-1", seq, ts, &body_sha256(&plain));
            http.post(format!("{url}/v1/ingest/batches"))
                .header("content-type", "application/json")
                .header("content-encoding", "gzip")
                .header(HEADER_GATEWAY, "gw-1")
                .header(HEADER_SEQUENCE, seq.to_string())
                .header(HEADER_TIMESTAMP, ts.to_string())
                .header(HEADER_SIGNATURE, sign(&key, &text))
                .body(gzip(&plain))
                .send()
                .await
                .expect("send")
        }
    };
    // 4 MB of whitespace inside valid JSON compresses to a few kilobytes.
    let mut bomb = batch("b1", vec![good_reading(aligned_past(3))]).to_string().into_bytes();
    bomb.splice(1..1, std::iter::repeat_n(b' ', 4 * 1024 * 1024));
    assert!(gzip(&bomb).len() < 64 * 1024);
    let r = send(bomb, 1).await;
    assert_eq!(r.status().as_u16(), 413);
    let e: Value = r.json().await.expect("json");
    assert!(e["reason"].as_str().unwrap_or("").contains("limit"), "{e}");
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 0);
    // A compressed batch within the limit is accepted.
    let r = send(batch("b2", vec![good_reading(aligned_past(3))]).to_string().into_bytes(), 2).await;
    assert_eq!(r.status().as_u16(), 200, "{:?}", r.text().await);
    assert_eq!(t.count("SELECT COUNT(*) FROM readings").await, 1);
}

/// Entry point of the crash test's gateway child process: runs `gateway run` on
/// the configuration named by METERVEIL_CHILD_GATEWAY until its file is done.
#[test]
#[ignore = "run by killed_gateways_and_a_killed_service_lose_and_repeat_nothing as a child process"]
fn child_gateway_process() {
    let Ok(path) = std::env::var("METERVEIL_CHILD_GATEWAY") else { return };
    // As the gateway binary logs (gateway/src/main.rs): the crash test reads it.
    tracing_subscriber::fmt()
        .with_env_filter(tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()))
        .with_writer(std::io::stderr)
        .init();
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let config = meterveil_gateway::config::GatewayConfig::load(std::path::Path::new(&path)).expect("config");
    let (_tx, rx) = tokio::sync::watch::channel(false);
    rt.block_on(meterveil_gateway::run::run(config, rx)).expect("gateway run");
}

fn serve_on(db: &str, port: u16) -> std::process::Child {
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .args(["serve", "--bind", &format!("127.0.0.1:{port}"), "--operator-token", TOKEN, "--no-worker"])
        .args(["--gateway-master-key", "test-master-key-0123456789abcdef0123456789"])
        .args(["--database-url", db])
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("serve");
    // Wait until it answers.
    for _ in 0..200 {
        if std::net::TcpStream::connect(("127.0.0.1", port)).is_ok() {
            return child;
        }
        std::thread::sleep(std::time::Duration::from_millis(25));
    }
    let _ = child.kill();
    let _ = child.wait();
    panic!("the service did not come up on port {port}");
}

/// A service told to stop (SIGTERM, as a service manager does) while a hundred
/// gateways upload: it stops taking connections, answers the uploads it had
/// taken (some answers arrive after the signal), exits 0, and every
/// acknowledged batch is stored whole. No upload is answered with a 5xx.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_terminated_service_finishes_the_uploads_it_took() {
    use meterveil_shared::auth::*;
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    let port = std::net::TcpListener::bind("127.0.0.1:0").expect("port").local_addr().expect("addr").port();
    let base = format!("http://127.0.0.1:{port}");
    let mut service = serve_on(&db, port);
    let http = reqwest::Client::new();
    let op = |path: &str, body: Value| {
        let req = http.post(format!("{base}{path}")).bearer_auth(TOKEN).json(&body);
        async move { req.send().await.expect("post").json::<Value>().await.expect("json") }
    };
    let gateways = 100;
    op("/v1/feeders", json!({"feeder_id": "F1"})).await;
    let meters: Vec<String> = (0..gateways).map(|i| format!("t{i:03}")).collect();
    op("/v1/feeders/F1/meters", json!({ "meter_ids": meters })).await;
    op("/v1/feeders/F1/profiles", json!({"noise": "gaussian", "scale_kw": 0.3, "boundaries_kw": [1.0, 2.0]})).await;
    let mut keys = Vec::new();
    for i in 0..gateways {
        let r = op("/v1/gateways", json!({"gateway_id": format!("gt{i:03}"), "feeder_id": "F1"})).await;
        keys.push(hex::decode(r["secret"].as_str().expect("secret")).expect("hex"));
    }

    // Each gateway uploads one day of its meter after another until the service is gone.
    let first_day = aligned_past(0) - aligned_past(0).rem_euclid(86_400) - 60 * 86_400;
    let started = std::time::Instant::now();
    let tasks: Vec<_> = keys
        .into_iter()
        .enumerate()
        .map(|(i, key)| {
            let (http, base) = (http.clone(), base.clone());
            tokio::spawn(async move {
                let mut answers = Vec::new(); // (batch id, status, answered after start)
                for day in 0..60i64 {
                    let rows: Vec<Value> = (0..96)
                        .map(|k| json!({"meter_id": format!("t{i:03}"), "interval_start": first_day + 86_400 * day + 900 * k, "level": k % 3, "profile_version": 1}))
                        .collect();
                    let id = format!("gt{i:03}-d{day}");
                    let body = json!({"batch_id": id, "gateway_id": format!("gt{i:03}"), "feeder_id": "F1", "readings": rows}).to_string();
                    let gw = format!("gt{i:03}");
                    // One timestamp for the signature and its header (two calls may straddle a second).
                    let ts = now_s();
                    let text = signing_text("POST", "/v1/ingest/batches", &gw, day as u64 + 1, ts, &body_sha256(body.as_bytes()));
                    let sent = http
                        .post(format!("{base}/v1/ingest/batches"))
                        .header(HEADER_GATEWAY, &gw)
                        .header(HEADER_SEQUENCE, (day + 1).to_string())
                        .header(HEADER_TIMESTAMP, ts.to_string())
                        .header(HEADER_SIGNATURE, sign(&key, &text))
                        .body(body)
                        .send()
                        .await;
                    match sent {
                        Ok(resp) => answers.push((id, resp.status().as_u16(), started.elapsed())),
                        Err(_) => break, // the service is gone
                    }
                }
                answers
            })
        })
        .collect();
    tokio::time::sleep(std::time::Duration::from_millis(700)).await;
    let signalled = started.elapsed();
    let killed = std::process::Command::new("kill").args(["-TERM", &service.id().to_string()]).status().expect("kill");
    assert!(killed.success());
    let exit = tokio::task::spawn_blocking(move || service.wait()).await.expect("join").expect("wait");
    let stopped = started.elapsed();
    assert!(exit.success(), "the service exits cleanly on SIGTERM: {exit:?}");
    assert!(stopped - signalled < std::time::Duration::from_secs(15), "stopping took {:?}", stopped - signalled);

    let mut acked = HashSet::new();
    let mut after_signal = 0;
    for t in tasks {
        for (id, status, at) in t.await.expect("gateway task") {
            assert_eq!(status, 200, "batch {id} was answered {status}");
            if at > signalled {
                after_signal += 1;
            }
            acked.insert(id);
        }
    }
    assert!(after_signal > 0, "no upload taken before the signal was answered after it");
    let store = meterveil_service::store::Store::open(&db).await.expect("store");
    let stored: Vec<String> =
        sqlx::query_scalar("SELECT batch_id FROM ingest_batches").fetch_all(store.pool()).await.expect("batches");
    let stored: HashSet<String> = stored.into_iter().collect();
    assert!(acked.is_subset(&stored), "{} acknowledged batches are not stored", acked.difference(&stored).count());
    let readings: i64 =
        sqlx::query_scalar("SELECT COUNT(*) FROM readings").fetch_one(store.pool()).await.expect("count");
    assert_eq!(readings, 96 * stored.len() as i64, "every stored batch is whole");
    eprintln!(
        "{} batches acknowledged, {} stored, {after_signal} answered after SIGTERM, stopped {:?} after it",
        acked.len(),
        stored.len(),
        stopped - signalled
    );
}

/// How far the gateway has queued its source file (0 before its first chunk).
async fn source_position(outbox: &std::path::Path) -> i64 {
    use std::str::FromStr;
    if !outbox.exists() {
        return 0;
    }
    let Ok(opts) = sqlx::sqlite::SqliteConnectOptions::from_str(&format!("sqlite:{}", outbox.display())) else {
        return 0;
    };
    let Ok(mut c) = sqlx::ConnectOptions::connect(&opts.read_only(true)).await else { return 0 };
    let pos: Option<i64> =
        sqlx::query_scalar("SELECT MAX(position) FROM source_progress").fetch_one(&mut c).await.ok().flatten();
    pos.unwrap_or(0)
}

/// A gateway child process; its log (stdout and stderr) is appended to `log`.
fn gateway_child(config: &std::path::Path, log: &std::path::Path) -> std::process::Child {
    let file = || std::fs::OpenOptions::new().create(true).append(true).open(log).expect("log file");
    std::process::Command::new(std::env::current_exe().expect("test binary"))
        .args(["child_gateway_process", "--exact", "--ignored", "--nocapture"])
        .env("METERVEIL_CHILD_GATEWAY", config)
        .env("RUST_LOG", "info")
        .stdout(file())
        .stderr(file())
        .spawn()
        .expect("gateway child")
}

/// One value of an SQLite record.
#[derive(Debug)]
enum Cell {
    Int(i64),
    Real(f64),
    Bytes(Vec<u8>),
}

fn varint(b: &[u8], mut at: usize) -> Option<(u64, usize)> {
    let mut v = 0u64;
    for i in 0..9 {
        let c = *b.get(at)?;
        at += 1;
        if i == 8 {
            return Some(((v << 8) | u64::from(c), at));
        }
        v = (v << 7) | u64::from(c & 0x7f);
        if c & 0x80 == 0 {
            return Some((v, at));
        }
    }
    None
}

/// The values of the record starting at `at` (header size, serial types, body),
/// as far as the page holds it.
fn record(b: &[u8], at: usize, out: &mut Vec<Cell>) -> Option<()> {
    let (hsize, mut h) = varint(b, at)?;
    let hend = at.checked_add(hsize as usize)?;
    let mut body = hend;
    while h < hend {
        let (t, next) = varint(b, h)?;
        h = next;
        let int = |n: usize| -> Option<i64> {
            let bytes = b.get(body..body + n)?;
            let mut v = if bytes[0] & 0x80 != 0 { -1i64 } else { 0 };
            for x in bytes {
                v = (v << 8) | i64::from(*x);
            }
            Some(v)
        };
        let (cell, len) = match t {
            1..=4 => (Cell::Int(int(t as usize)?), t as usize),
            5 => (Cell::Int(int(6)?), 6),
            6 => (Cell::Int(int(8)?), 8),
            7 => (Cell::Real(f64::from_be_bytes(b.get(body..body + 8)?.try_into().ok()?)), 8),
            12.. => {
                let n = ((t - 12) / 2) as usize;
                (Cell::Bytes(b.get(body..(body + n).min(b.len()))?.to_vec()), n)
            }
            _ => continue, // NULL, 0, 1: nothing stored
        };
        out.push(cell);
        body += len;
    }
    Some(())
}

/// Every record value of every b-tree page image in an SQLite database file or
/// WAL file (the WAL keeps older images of a page beside the newest).
fn sqlite_cells(file: &[u8], wal: bool) -> Vec<Cell> {
    let mut pages: Vec<(&[u8], usize)> = Vec::new();
    if wal {
        let size = file.get(8..12).map_or(0, |b| u32::from_be_bytes(b.try_into().unwrap()) as usize);
        let mut at = 32;
        while size > 0 && at + 24 + size <= file.len() {
            pages.push((&file[at + 24..at + 24 + size], 0));
            at += 24 + size;
        }
    } else {
        let size = match file.get(16..18).map(|b| u16::from_be_bytes([b[0], b[1]])) {
            Some(1) => 65_536,
            Some(s) => usize::from(s),
            None => 0,
        };
        for (i, p) in file.chunks(size.max(512)).enumerate() {
            pages.push((p, if i == 0 { 100 } else { 0 }));
        }
    }
    let mut out = Vec::new();
    for (page, h) in pages {
        let Some(&kind) = page.get(h) else { continue };
        let count = page.get(h + 3..h + 5).map_or(0, |b| usize::from(u16::from_be_bytes([b[0], b[1]])));
        let ptrs = h + if kind == 0x0d || kind == 0x0a { 8 } else { 12 };
        for c in 0..count {
            let Some(p) = page.get(ptrs + 2 * c..ptrs + 2 * c + 2) else { break };
            let cell = usize::from(u16::from_be_bytes([p[0], p[1]]));
            let start = match kind {
                0x0d => varint(page, cell).and_then(|(_, a)| varint(page, a)).map(|(_, a)| a),
                0x0a => varint(page, cell).map(|(_, a)| a),
                0x02 => varint(page, cell + 4).map(|(_, a)| a),
                _ => None,
            };
            if let Some(start) = start {
                let _ = record(page, start, &mut out);
            }
        }
    }
    out
}

/// Which of a meter's prefix sums (Wh) a value equals, in mWh, Wh, kWh or
/// summed kW. Integers count from 100 kWh-scale sizes up (≥ 10^6 mWh,
/// ≥ 10^5 Wh): smaller ones are the outbox's own counters and levels.
fn energy_match(cell: &Cell, prefix_wh: &std::collections::HashSet<i64>, texts: &[String]) -> Option<String> {
    match cell {
        Cell::Int(v) => (*v >= 1_000_000 && v % 1000 == 0 && prefix_wh.contains(&(v / 1000)))
            .then(|| format!("{v} mWh"))
            .or_else(|| (*v >= 100_000 && prefix_wh.contains(v)).then(|| format!("{v} Wh"))),
        Cell::Real(x) => [1000.0, 1.0, 0.001, 0.004]
            .iter()
            .map(|f| x / f)
            .find(|wh| wh.fract() == 0.0 && prefix_wh.contains(&(*wh as i64)) && *wh >= 1.0)
            .map(|wh| format!("{x} (a prefix sum of {wh} Wh)")),
        Cell::Bytes(b) => texts.iter().find(|t| contains_delimited(b, t.as_bytes())).cloned(),
    }
}

/// A meter's prefix sums as text, found only where no letter, digit or point
/// adjoins (so a longer number, a hex id or a timestamp's fraction does not count).
fn energy_text_patterns(prefix_wh: &[i64]) -> Vec<String> {
    let mut out = Vec::new();
    for &wh in prefix_wh {
        let kwh = wh as f64 / 1000.0;
        out.extend([(wh * 1000).to_string(), format!("{kwh:.3}"), format!("{}", wh as f64 / 250.0)]);
        if wh >= 100_000 {
            out.push(wh.to_string());
        }
        if wh % 1000 != 0 {
            out.push(format!("{kwh}"));
        }
    }
    out.retain(|t| t.len() >= 6);
    out
}

fn contains_delimited(hay: &[u8], needle: &[u8]) -> bool {
    // A digit, letter (hex ids) or point next to it makes it part of another token.
    let edge = |b: Option<&u8>| b.is_none_or(|c| !c.is_ascii_alphanumeric() && *c != b'.');
    hay.windows(needle.len())
        .enumerate()
        .any(|(i, w)| w == needle && edge(i.checked_sub(1).and_then(|p| hay.get(p))) && edge(hay.get(i + needle.len())))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn killed_gateways_and_a_killed_service_lose_and_repeat_nothing() {
    use rand::{Rng, SeedableRng};
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    let port = std::net::TcpListener::bind("127.0.0.1:0").expect("port").local_addr().expect("addr").port();
    let base = format!("http://127.0.0.1:{port}");
    let mut service = serve_on(&db, port);
    let http = reqwest::Client::new();
    let op = |path: &str, body: Value| {
        let (http, url) = (http.clone(), format!("{base}{path}"));
        async move {
            http.post(url)
                .bearer_auth(TOKEN)
                .json(&body)
                .send()
                .await
                .expect("post")
                .json::<Value>()
                .await
                .expect("json")
        }
    };
    op("/v1/feeders", json!({"feeder_id": "F1"})).await;
    let meters: Vec<String> = (1..=12).map(|i| format!("m{i}")).collect();
    op("/v1/feeders/F1/meters", json!({ "meter_ids": meters })).await;
    op(
        "/v1/feeders/F1/profiles",
        json!({"noise": "gaussian", "scale_kw": 0.3, "boundaries_kw": [1.0, 2.0], "send_registers": true}),
    )
    .await;
    let secret = op("/v1/gateways", json!({"gateway_id": "gw-1", "feeder_id": "F1"})).await["secret"]
        .as_str()
        .expect("secret")
        .to_owned();

    // A week of 15-minute energies for twelve meters, in time order, starting at
    // 10:00: the first day was not counted from its start, so it gets no read.
    let start = aligned_past(0) - aligned_past(0).rem_euclid(86_400) - 8 * 86_400 + 40 * 900;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(12);
    let mut csv = String::from("meter_id,interval_start,wh\n");
    let mut source: std::collections::BTreeMap<(String, i64), i64> = Default::default();
    let mut day_offsets = Vec::new(); // byte offsets where whole days 1 and 2 begin
    for i in 0..7 * 96 {
        if (start + 900 * i).rem_euclid(86_400) == 0 {
            day_offsets.push(csv.len() as i64);
        }
        for m in &meters {
            let wh: i64 = rng.random_range(20..900);
            csv.push_str(&format!("{m},{},{wh}\n", start + 900 * i));
            source.insert((m.clone(), start + 900 * i), wh);
        }
        if i == 200 {
            // An invalid reading: its value must not reach the log.
            csv.push_str(&format!("m1,{},-987654\n", start + 900 * i));
        }
    }
    std::fs::write(dir.path().join("week.csv"), &csv).expect("write");
    let log = dir.path().join("gateway.log");
    let config = dir.path().join("gateway.toml");
    std::fs::write(
        &config,
        format!(
            "gateway_id = \"gw-1\"\nfeeder_id = \"F1\"\nsecret = \"{secret}\"\nservice_url = \"{base}\"\noutbox = \"{}\"\n\
             [source]\nkind = \"file\"\npath = \"{}\"\n[upload]\nbatch_max = 24\ninitial_ms = 20\nmax_ms = 200\n",
            dir.path().join("outbox.sqlite").display(),
            dir.path().join("week.csv").display()
        ),
    )
    .expect("config");

    // Kill the gateway at random moments; once, kill the service too while it ingests.
    let mut kills = 0;
    let mut progress = Vec::new();
    let watcher = meterveil_service::store::Store::open(&db).await.expect("open");
    let outbox_file = dir.path().join("outbox.sqlite");
    for round in 0..12 {
        let mut gw = gateway_child(&config, &log);
        if round == 0 {
            // The first kill lands while the source is being read, after the
            // first whole day began: the day it interrupts loses its read, and
            // nothing else does.
            let t0 = std::time::Instant::now();
            loop {
                let pos = source_position(&outbox_file).await;
                if pos > day_offsets[0] && pos < csv.len() as i64 {
                    break;
                }
                assert!(t0.elapsed().as_secs() < 60, "the gateway never started reading");
                tokio::time::sleep(std::time::Duration::from_millis(1)).await;
            }
        } else {
            tokio::time::sleep(std::time::Duration::from_millis(rng.random_range(30..250))).await;
        }
        if round == 3 {
            service.kill().expect("SIGKILL service");
            service.wait().expect("reaped");
            tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        }
        if gw.try_wait().expect("poll").is_none() {
            gw.kill().expect("SIGKILL gateway");
            kills += 1;
        }
        gw.wait().expect("reaped");
        if round == 3 {
            service = serve_on(&db, port);
        }
        let n: i64 =
            sqlx::query_scalar("SELECT COUNT(*) FROM readings").fetch_one(watcher.pool()).await.expect("count");
        progress.push(n);
    }
    // A last run to the end of the file.
    let mut gw = gateway_child(&config, &log);
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(180);
    let status = loop {
        if let Some(s) = gw.try_wait().expect("poll") {
            break s;
        }
        assert!(std::time::Instant::now() < deadline, "the last gateway run did not finish");
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    };
    assert!(status.success(), "the last gateway run failed");
    let _ = service.kill();
    let _ = service.wait();

    // Nothing the gateway wrote holds any prefix sum of any meter's readings: no
    // value of any record in any page image of the outbox or its WAL (older
    // images included), and no text in its log. (The shm file is the WAL's index
    // of page numbers; it holds no record.)
    let outbox = dir.path().join("outbox.sqlite");
    let mut cells = sqlite_cells(&std::fs::read(&outbox).expect("outbox"), false);
    let db_cells = cells.len();
    if let Ok(w) = std::fs::read(format!("{}-wal", outbox.display())) {
        cells.extend(sqlite_cells(&w, true));
    }
    let log_bytes = std::fs::read(&log).expect("gateway log");
    let log_text = String::from_utf8_lossy(&log_bytes);
    assert!(log_text.contains("line") && log_text.contains("wh"), "the rejected line was logged: {log_text}");
    for v in ["987654", "-987654", "3950.616", "-3950.616"] {
        assert!(!contains_delimited(&log_bytes, v.as_bytes()), "a rejected reading's value {v} reached the log");
    }
    let mut checked = 0;
    for m in &meters {
        let mut run = 0;
        let prefix: std::collections::HashSet<i64> = source
            .iter()
            .filter(|((mm, _), _)| mm == m)
            .map(|(_, wh)| {
                run += wh;
                run
            })
            .collect();
        let texts = energy_text_patterns(&prefix.iter().copied().collect::<Vec<_>>());
        for c in &cells {
            if let Some(what) = energy_match(c, &prefix, &texts) {
                panic!("{m}'s prefix sum {what} found in an outbox record: {c:?}");
            }
            checked += 1;
        }
        for t in &texts {
            if contains_delimited(&log_bytes, t.as_bytes()) {
                let at = log_text.find(t.as_str()).unwrap_or(0);
                panic!(
                    "{m}'s prefix sum {t} found in the log: {}",
                    &log_text[at.saturating_sub(120)..(at + 60).min(log_text.len())]
                );
            }
        }
    }
    assert!(db_cells > 100, "the record scan read only {db_cells} values of the outbox");
    let patterns = checked;

    let store = meterveil_service::store::Store::open(&db).await.expect("open");
    let stored: Vec<(String, i64)> =
        sqlx::query_as("SELECT meter_id, interval_start FROM readings ORDER BY meter_id, interval_start")
            .fetch_all(store.pool())
            .await
            .expect("readings");
    let keys: Vec<(String, i64)> = source.keys().cloned().collect();
    eprintln!(
        "crash test: {kills} gateway kills, one service kill; readings stored after each kill {progress:?}; finally {} of {}; {patterns} record values checked against every prefix sum",
        stored.len(),
        keys.len()
    );
    assert!(kills >= 5, "only {kills} kills landed while the gateway ran");
    let interrupted = progress.iter().filter(|&&n| n > 0 && (n as usize) < keys.len()).count();
    assert!(interrupted >= 3, "too few kills interrupted an upload half way: {progress:?}");
    assert_eq!(stored, keys, "every source reading stored exactly once");
    // Energy checksum: every advance sent is exactly the source's energy of its
    // day; the days without one are the first (counted from 10:00) and those a
    // kill interrupted, at most one per kill.
    let reads: Vec<(String, i64, i64, i64)> =
        sqlx::query_as("SELECT meter_id, period_start, read_at, wh FROM register_advances ORDER BY meter_id, read_at")
            .fetch_all(store.pool())
            .await
            .expect("reads");
    for (m, from, to, wh) in &reads {
        assert_eq!(to - from, 86_400, "{m}: a daily period");
        let want: i64 = (0..96).filter_map(|i| source.get(&(m.clone(), from + 900 * i))).sum();
        assert_eq!(*wh, want, "{m} day {from}");
    }
    let first_day = start - start.rem_euclid(86_400);
    let whole_days: Vec<i64> = (1..7).map(|d| first_day + d * 86_400).collect();
    let mut missing = std::collections::BTreeMap::<i64, usize>::new();
    for m in &meters {
        for d in &whole_days {
            if !reads.iter().any(|r| &r.0 == m && r.1 == *d) {
                *missing.entry(*d).or_default() += 1;
            }
        }
        assert!(!reads.iter().any(|r| &r.0 == m && r.1 == first_day), "{m}: a read for the day it joined mid-way");
    }
    let days_missing = missing.len();
    eprintln!(
        "register advances: {} of {} whole meter-days; days missing a read (interrupted by a kill): {missing:?}",
        reads.len(),
        meters.len() * whole_days.len()
    );
    assert!(days_missing <= kills, "{days_missing} days lost reads, more than the {kills} kills explain");
    assert!(days_missing >= 1, "the kill while reading interrupted no day");
    assert!(reads.len() >= meters.len() * (whole_days.len() - days_missing));
}

/// Four worker stores on one database claim concurrently (each its own connection
/// pool, as separate processes would): two sharded by feeder, two unsharded.
/// Every job is claimed exactly once, a sharded worker only takes its feeder's
/// jobs, and town-wide analyses go only to unsharded workers.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn several_workers_share_one_queue_and_claim_each_job_once() {
    use meterveil_service::jobspec::{AuditSpec, ClusterSpec, JobSpec, RankSetting, RecoverSpec};
    use meterveil_service::store::Store;
    let dir = tempfile::tempdir().expect("tempdir");
    let db = test_database(dir.path()).await;
    let setup = Store::open(&db).await.expect("open");
    let now = now_s();
    let mut want: std::collections::BTreeMap<String, Option<String>> = Default::default();
    for f in ["F1", "F2"] {
        let fid = FeederId::parse(f).expect("id");
        setup.create_feeder(&fid, f, "UTC", now).await.expect("feeder");
        for i in 0..15 {
            let id = format!("rec-{f}-{i:02}");
            let spec = RecoverSpec {
                feeder_id: fid.clone(),
                from: 0,
                to: 86_400,
                rank: RankSetting::AUTO,
                alpha_kw: 15.0,
                warm_from: None,
                settles: None,
                band_draws: 0,
            };
            setup.create_job(&id, &spec, now - 100 + i).await.expect("job");
            want.insert(id, Some(f.to_owned()));
        }
        let id = format!("aud-{f}");
        let audit = AuditSpec {
            recovery_job: "rec-x".into(),
            captured: vec![meterveil_shared::MeterId::parse("m1").expect("id")],
            seed: 1,
            register_period: None,
            curves: false,
        };
        setup.create_analysis(&id, &JobSpec::Audit(audit), Some(f), now).await.expect("audit");
        want.insert(id, Some(f.to_owned()));
    }
    for i in 0..4 {
        let id = format!("clu-town-{i}");
        let spec = JobSpec::Cluster(ClusterSpec { recovery_jobs: vec!["rec-x".into()], clusters: None });
        setup.create_analysis(&id, &spec, None, now).await.expect("cluster");
        want.insert(id, None);
    }
    let shards: [Option<Vec<String>>; 4] = [Some(vec!["F1".into()]), Some(vec!["F2".into()]), None, None];
    let mut tasks = Vec::new();
    for shard in shards.clone() {
        let db = db.clone();
        tasks.push(tokio::spawn(async move {
            let store = Store::open(&db).await.expect("open worker store");
            let mut got = Vec::new();
            while let Some(c) = store.claim_next(now_s(), 600, 3, shard.as_deref()).await.expect("claim") {
                got.push(c.job_id);
                tokio::task::yield_now().await;
            }
            (store.worker_id().to_owned(), got)
        }));
    }
    let mut claimed: std::collections::BTreeMap<String, usize> = Default::default();
    let mut per_worker = Vec::new();
    for t in tasks {
        per_worker.push(t.await.expect("worker task"));
    }
    for ((worker, got), shard) in per_worker.iter().zip(&shards) {
        for id in got {
            *claimed.entry(id.clone()).or_default() += 1;
            let feeder = &want[id];
            if let Some(s) = shard {
                assert!(feeder.as_ref().is_some_and(|f| s.contains(f)), "{worker} ({s:?}) took {id}");
            }
            let holder: String = sqlx::query_scalar(if id.starts_with("rec-") {
                "SELECT worker FROM recovery_jobs WHERE job_id = $1"
            } else {
                "SELECT worker FROM analysis_jobs WHERE job_id = $1"
            })
            .bind(id)
            .fetch_one(setup.pool())
            .await
            .expect("holder");
            assert_eq!(&holder, worker, "{id} is held by the worker that claimed it");
        }
    }
    let counts: Vec<usize> = per_worker.iter().map(|(_, g)| g.len()).collect();
    eprintln!("{:?} backend: claims per worker (F1, F2, any, any) {counts:?}", setup.backend());
    assert_eq!(
        claimed.keys().cloned().collect::<Vec<_>>(),
        want.keys().cloned().collect::<Vec<_>>(),
        "every job claimed"
    );
    assert!(claimed.values().all(|&n| n == 1), "a job was claimed twice: {claimed:?}");
    for (id, f) in &want {
        if f.is_none() {
            let holder = per_worker.iter().position(|(_, g)| g.contains(id)).expect("claimed");
            assert!(holder >= 2, "town-wide {id} went to a sharded worker");
        }
    }
}
