//! Property-based fuzzing of the batch decoder and validators: arbitrary bytes,
//! mutations of the seed bodies in tests/fuzz-seeds/, and structurally random
//! batches. None may panic; every refusal names a field and a reason; every
//! accepted batch holds only values the validators allow.

use std::collections::HashSet;

use meterveil_service::ingest::{check_header, validate, IngestContext};
use meterveil_service::records::ProfileRecord;
use meterveil_service::routes::parse_json;
use meterveil_shared::auth::body_sha256;
use meterveil_shared::wire::BatchWire;
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId, ProfileVersion};
use proptest::prelude::*;

const CASES: u32 = 20_000;
const NOW: i64 = 1_700_006_400;

/// The seed bodies, each with its file name, in name order.
fn named_seeds() -> Vec<(String, Vec<u8>)> {
    let dir = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/fuzz-seeds");
    let mut out: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .expect("seed folder")
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| (p.file_name().unwrap_or_default().to_string_lossy().into_owned(), std::fs::read(&p).expect("seed")))
        .collect();
    out.sort();
    assert!(out.len() >= 4, "seeds missing");
    out
}

fn seeds() -> Vec<Vec<u8>> {
    named_seeds().into_iter().map(|(_, b)| b).collect()
}

fn profiles() -> Vec<ProfileRecord> {
    let p = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 0.3,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: true,
        register_period: None,
    })
    .expect("profile");
    vec![ProfileRecord {
        feeder_id: FeederId::parse("F1").expect("id"),
        version: ProfileVersion(1),
        created_at: NOW - 86_400 * 400,
        profile: p,
        in_use: true,
        published_by: "operator (HTTP API)".into(),
        first_used_at: Some(NOW - 86_400 * 399),
    }]
}

fn known() -> HashSet<String> {
    ["m1".to_owned(), "m2".to_owned()].into()
}

/// The validators' view of the test feeder at `NOW`.
fn context<'a>(profiles: &'a [ProfileRecord], known: &'a HashSet<String>) -> IngestContext<'a> {
    IngestContext { profiles, known_meters: known, now: NOW, clock_tolerance_s: 300, stale_grace_s: 86_400 }
}

/// Runs the whole decode-and-validate path; panics only on a broken invariant.
fn run(body: &[u8]) {
    let profiles = profiles();
    let known = known();
    let batch = match parse_json::<BatchWire>(body) {
        Ok(b) => b,
        Err(e) => return assert!(!e.to_string().is_empty()),
    };
    let header = match check_header(&batch) {
        Ok(h) => h,
        Err(e) => return assert!(!e.to_string().is_empty()),
    };
    let ctx = context(&profiles, &known);
    match validate(header, &batch, body_sha256(body), &ctx) {
        Ok(v) => {
            assert!(!v.readings.is_empty() || !v.registers.is_empty());
            for r in &v.readings {
                assert!(r.level < 3 && known.contains(r.meter_id.as_str()));
                assert!(r.interval_start % 900 == 0 && r.interval_start + 900 <= NOW + 300);
            }
        }
        Err(e) => {
            let s = e.to_string();
            assert!(s.contains(':') && s.len() > 3, "a refusal without field and reason: {s:?}");
        }
    }
}

/// The corpus is what its names say: `accept-*` seeds are valid batches (so
/// the mutations start from accepted input and probe the validators, not only
/// the decoder), and `refuse-*` seeds are refused with a named field.
#[test]
fn seeds_are_accepted_or_refused_as_named() {
    let (profiles, known) = (profiles(), known());
    let ctx = context(&profiles, &known);
    let judge = |body: &[u8]| -> Result<usize, String> {
        let batch: BatchWire = parse_json(body).map_err(|e| e.to_string())?;
        let header = check_header(&batch).map_err(|e| e.to_string())?;
        let v = validate(header, &batch, body_sha256(body), &ctx).map_err(|e| e.to_string())?;
        Ok(v.readings.len() + v.registers.len())
    };
    let seeds = named_seeds();
    assert!(seeds.iter().any(|(n, _)| n.starts_with("accept-")), "no seed to accept");
    for (name, body) in &seeds {
        match (name.starts_with("accept-"), judge(body)) {
            (true, Ok(rows)) => assert!(rows > 0, "{name} holds nothing"),
            (true, Err(e)) => panic!("{name} is refused: {e}"),
            (false, Ok(_)) => panic!("{name} is accepted"),
            (false, Err(e)) => assert!(e.contains(':'), "{name}'s refusal names no field: {e}"),
        }
    }
}

fn mutate(seed: &[u8], ops: &[(u8, usize, u8)]) -> Vec<u8> {
    let mut b = seed.to_vec();
    for &(op, at, byte) in ops {
        let i = if b.is_empty() { 0 } else { at % b.len() };
        match op % 4 {
            0 if !b.is_empty() => b[i] = byte,
            1 => b.insert(i.min(b.len()), byte),
            2 if !b.is_empty() => {
                b.remove(i);
            }
            _ => {
                let tail = b[i.min(b.len())..].to_vec();
                b.extend_from_slice(&tail[..tail.len().min(64)]);
            }
        }
    }
    b
}

proptest! {
    #![proptest_config(ProptestConfig { cases: CASES, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn arbitrary_bytes_never_panic(body in proptest::collection::vec(any::<u8>(), 0..512)) {
        run(&body);
    }

    #[test]
    fn mutated_seeds_never_panic(
        seed in 0usize..64,
        ops in proptest::collection::vec((any::<u8>(), any::<usize>(), any::<u8>()), 1..12),
    ) {
        let s = seeds();
        run(&mutate(&s[seed % s.len()], &ops));
    }

    #[test]
    fn random_batches_are_judged_consistently(
        meters in proptest::collection::vec("[a-z0-9]{1,3}", 1..6),
        starts in proptest::collection::vec(-2_000i64..2_000, 1..40),
        levels in proptest::collection::vec(0u8..8, 1..40),
        versions in proptest::collection::vec(0u32..3, 1..40),
        gateway in "[a-zA-Z0-9 _-]{0,12}",
    ) {
        let readings: Vec<serde_json::Value> = starts
            .iter()
            .enumerate()
            .map(|(i, s)| {
                serde_json::json!({
                    "meter_id": meters[i % meters.len()],
                    "interval_start": NOW - 86_400 + s * 450,
                    "level": levels[i % levels.len()],
                    "profile_version": versions[i % versions.len()],
                })
            })
            .collect();
        let body = serde_json::json!({"batch_id": "b", "gateway_id": gateway, "feeder_id": "F1", "readings": readings});
        run(body.to_string().as_bytes());
    }
}

#[test]
fn the_seeds_themselves_pass_and_the_count_is_stated() {
    for s in seeds() {
        run(&s);
    }
    eprintln!("fuzzing: {} generated executions per run over {} seeds", 3 * CASES, seeds().len());
}
