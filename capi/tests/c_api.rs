//! The C API from C: `tests/c/host_test.c`, compiled with the host's `gcc` against the host build
//! of the static library, must refuse every bad argument with its code, and give, for every
//! reading, the d² bits, contribution bits, fault codes and alarm timeline the Rust core gives.

use std::path::{Path, PathBuf};
use std::process::Command;

use ellipsoid_core::{
    blob, AlarmMachine, AlarmPolicy, EventKind, FaultCause, Model, ModelMeta, ModelParams,
    Preprocess, ReadingFault, Step, Thresholds,
};

const N: usize = 5;

/// A small deterministic generator (a 32-bit LCG, constants from Numerical Recipes), in [-1, 1).
struct Lcg(u32);

impl Lcg {
    fn next(&mut self) -> f32 {
        self.0 = self.0.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
        (self.0 >> 8) as f32 / (1u32 << 23) as f32 - 1.0
    }
}

/// An invented model of five features, feature 1 log-transformed, raise after 2, clear after 3.
fn params() -> ModelParams<N> {
    let mut rng = Lcg(7);
    let mut p = ModelParams::<N> {
        meta: ModelMeta {
            model_id: 0x00c0_ffee,
            trained_at: 1_772_452_800,
            sequence: 4,
        },
        preprocess: Preprocess {
            log_mask: 0b10,
            ..Preprocess::identity()
        },
        mean: [0.0; N],
        w: [[0.0; N]; N],
        thresholds: Thresholds {
            alarm: 15.0,
            clear: 8.0,
        },
        policy: AlarmPolicy {
            raise_after: 2,
            clear_after: 3,
            latch: false,
        },
    };
    for i in 0..N {
        p.preprocess.offset[i] = 20.0 * rng.next();
        p.preprocess.scale[i] = 1.0 + 0.5 * rng.next();
        p.mean[i] = 0.2 * rng.next();
        for j in 0..i {
            p.w[i][j] = 0.4 * rng.next();
        }
        p.w[i][i] = 1.2 + 0.3 * rng.next();
    }
    p.preprocess.offset[1] = 1.0;
    p
}

/// Readings around the centre, drifting out and back, with a dropout, a log-domain fault and an
/// overflow among them.
fn readings(model: &Model<N>) -> Vec<[f32; N]> {
    let mut rng = Lcg(99);
    let mut rows = Vec::new();
    for k in 0..400 {
        let spread = if (120..180).contains(&k) { 6.0 } else { 1.0 };
        let mut x = [0.0f32; N];
        for (i, xi) in x.iter_mut().enumerate() {
            let c = model.center()[i];
            *xi = if i == 1 {
                (c + 0.3 * spread * rng.next()).exp()
            } else {
                c + spread * rng.next()
            };
        }
        match k {
            50 => x[3] = f32::NAN,
            51 => x[0] = f32::INFINITY,
            90 => x[1] = -1.0,
            91 => x[1] = 0.0,
            200 => x[2] = 1.0e30,
            _ => {}
        }
        rows.push(x);
    }
    rows
}

fn fault_code(f: ReadingFault) -> (i32, u8) {
    match f {
        ReadingFault::NotFinite { feature } => (48, feature),
        ReadingFault::LogDomain { feature } => (49, feature),
        ReadingFault::Overflow => (50, 0),
        ReadingFault::ContributionOverflow => (51, 0),
        other => panic!("a fault the test does not know: {other:?}"),
    }
}

fn step_text(step: &Step) -> String {
    let mut s = format!(
        " alarm={} fault={} events=",
        u8::from(step.alarm),
        u8::from(step.fault)
    );
    if step.events.is_empty() {
        s.push('-');
    }
    for (k, e) in step.events.iter().enumerate() {
        let (kind, cause, feature) = match e.kind {
            EventKind::Raised => (1, 0, 0),
            EventKind::Cleared => (2, 0, 0),
            EventKind::Reset => (3, 0, 0),
            EventKind::Fault(FaultCause::Reading(f)) => {
                let (c, feat) = fault_code(f);
                (4, c, feat)
            }
            EventKind::Fault(FaultCause::NoModel) => (4, 53, 0),
            EventKind::FaultCleared => (5, 0, 0),
            other => panic!("an event the test does not know: {other:?}"),
        };
        if k > 0 {
            s.push(',');
        }
        s.push_str(&format!("{kind}:{cause}:{feature}:{}", e.index));
    }
    s
}

/// What the C program must print for each reading, from the Rust core.
fn expected(model: &Model<N>, rows: &[[f32; N]]) -> Vec<String> {
    let mut alarm = AlarmMachine::new(model.thresholds(), model.policy());
    let mut lines = Vec::new();
    for (i, x) in rows.iter().enumerate() {
        let score = model.score(x);
        let step = alarm.update(&score);
        let (st, d2, above, feature) = match score {
            Ok(s) => (0, s.d2, u8::from(s.d2 > model.thresholds().alarm), 0),
            Err(f) => {
                let (c, feat) = fault_code(f);
                (c, f32::NAN, 0, feat)
            }
        };
        let (ex, contributions) = match model.explain(x) {
            Ok(e) => (0, e.contributions),
            Err(f) => (fault_code(f).0, [f32::NAN; N]),
        };
        let c: Vec<String> = contributions
            .iter()
            .map(|v| format!("{:08x}", v.to_bits()))
            .collect();
        lines.push(format!(
            "r {i} st={st} d2={:08x} above={above} feature={feature}{} ex={ex} c={}",
            d2.to_bits(),
            step_text(&step),
            c.join(",")
        ));
        if i == 150 {
            lines.push(format!("reset{}", step_text(&alarm.reset())));
        }
    }
    lines
}

/// The host build of the static library that this test run built: the newest
/// `libellipsoid_capi-*.a` beside the test binary, which must be newer than the source.
fn staticlib() -> PathBuf {
    let exe = std::env::current_exe().expect("the test binary's path");
    let deps = exe.parent().expect("the test binary's folder");
    let newest = std::fs::read_dir(deps)
        .expect("list the deps folder")
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.starts_with("libellipsoid_capi-") && n.ends_with(".a"))
        })
        .max_by_key(|p| p.metadata().and_then(|m| m.modified()).ok())
        .expect("no libellipsoid_capi-*.a beside the test binary (is crate-type staticlib set?)");
    let modified = |p: &Path| p.metadata().and_then(|m| m.modified()).unwrap();
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src/lib.rs");
    assert!(
        modified(&newest) >= modified(&src),
        "{} is older than src/lib.rs",
        newest.display()
    );
    newest
}

#[test]
fn c_program_matches_the_rust_core_bit_for_bit() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"));
    let work = Path::new(env!("CARGO_TARGET_TMPDIR")).join("capi-host-test");
    std::fs::create_dir_all(&work).unwrap();
    let params = params();
    let mut buf = [0u8; blob::max_len(N)];
    let len = blob::encode(&params, &mut buf).unwrap();
    let blob_path = work.join("model.blob");
    std::fs::write(&blob_path, &buf[..len]).unwrap();
    let model = Model::<N>::from_blob(&buf[..len]).unwrap();
    let rows = readings(&model);
    let mut table = (rows.len() as u32).to_le_bytes().to_vec();
    for r in &rows {
        for v in r {
            table.extend_from_slice(&v.to_le_bytes());
        }
    }
    let table_path = work.join("readings.bin");
    std::fs::write(&table_path, &table).unwrap();

    let exe = work.join("host_test");
    let out = Command::new("gcc")
        .args(["-std=c99", "-O1", "-Wall", "-Wextra", "-Werror", "-I"])
        .arg(dir.join("include"))
        .arg(dir.join("tests/c/host_test.c"))
        .arg(staticlib())
        .args(["-lpthread", "-ldl", "-lm", "-o"])
        .arg(&exe)
        .output()
        .expect("run gcc (the host C compiler)");
    assert!(
        out.status.success(),
        "gcc failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let run = Command::new(&exe)
        .arg(&blob_path)
        .arg(&table_path)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&run.stdout);
    let failed: Vec<&str> = text.lines().filter(|l| l.contains("FAILED")).collect();
    assert!(failed.is_empty(), "the C checks failed: {failed:#?}");
    assert!(run.status.success(), "host_test exited with {}", run.status);
    let checks = text.lines().filter(|l| l.starts_with("check ")).count();
    assert!(checks >= 40, "only {checks} argument checks ran");

    let info = text.lines().find(|l| l.starts_with("model ")).unwrap();
    assert_eq!(
        info,
        format!(
            "model id=00c0ffee seq=4 n=5 alarm={:08x} clear={:08x} raise=2 clear_after=3 latch=0",
            15.0f32.to_bits(),
            8.0f32.to_bits()
        )
    );
    let got: Vec<&str> = text
        .lines()
        .filter(|l| l.starts_with("r ") || l.starts_with("reset"))
        .collect();
    let want = expected(&model, &rows);
    assert_eq!(got.len(), want.len(), "lines from C against the Rust core");
    for (g, w) in got.iter().zip(&want) {
        assert_eq!(*g, w.as_str());
    }
    // The data exercised what it is meant to: scores above and below, every fault kind here, an
    // alarm raised and cleared, and a reset that did something or not.
    let count = |s: &str| want.iter().filter(|l| l.contains(s)).count();
    for (what, s) in [
        ("scored", "st=0 "),
        ("above the threshold", "above=1"),
        ("not finite", "st=48 "),
        ("log domain", "st=49 "),
        ("overflow", "st=50 "),
        ("alarm raised", "1:0:0:"),
        ("alarm cleared", "2:0:0:"),
        ("fault cleared", "5:0:0:"),
        ("alarm reset", "reset alarm=0 fault=0 events=3:0:0:151"),
    ] {
        assert!(count(s) > 0, "the readings have no line {what} ({s:?})");
    }
    assert!(text.contains(&format!("end readings={} failures=0", rows.len())));
}
