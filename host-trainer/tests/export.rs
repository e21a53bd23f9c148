//! `ellipsoid export`, checked from outside: the Intel HEX file read back by GNU objcopy
//! (`arm-none-eabi-objcopy -I ihex -O binary`, Debian's binutils-arm-none-eabi) and by objdump for
//! its address, the C array compiled by the system's C compiler and its bytes compared, and the
//! boards' slot addresses against the firmware's memory maps. A check whose tool is missing is
//! skipped with a printed reason; `.ci/run` installs both, so CI never skips.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command as Process;

use assert_cmd::Command;
use ellipsoid_trainer::commands::export::Board;
use predicates::prelude::*;

fn ellipsoid() -> Command {
    Command::cargo_bin("ellipsoid").unwrap()
}

/// A small correlated 3-channel baseline, deterministic (no generator); test data only.
fn baseline_csv(rows: usize) -> String {
    let mut s = String::from("current_a,pressure_bar,temp_c\n");
    for i in 0..rows {
        let t = i as f64;
        let a = (t * 0.37).sin() + 0.3 * (t * 1.91).cos();
        let b = (t * 0.73).cos();
        let c = (t * 2.39).sin();
        let _ = writeln!(
            s,
            "{:.4},{:.4},{:.4}",
            10.0 + a,
            3.0 + 0.5 * a + 0.1 * b,
            40.0 + 2.0 * c
        );
    }
    s
}

/// A fitted blob in `dir`, with sequence 7.
fn blob(dir: &Path) -> PathBuf {
    let base = dir.join("base.csv");
    std::fs::write(&base, baseline_csv(600)).unwrap();
    let out = dir.join("pump.blob");
    ellipsoid()
        .args([
            "fit",
            base.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .args(["--quiet", "--sequence", "7", "--trained-at", "1767225600"])
        .assert()
        .success();
    out
}

fn export(blob: &Path, out: &Path, args: &[&str]) -> Command {
    let mut c = ellipsoid();
    c.args([
        "export",
        blob.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    c.args(args);
    c
}

fn have(tool: &str) -> bool {
    Process::new(tool).arg("--version").output().is_ok()
}

#[test]
fn raw_is_the_blob_and_the_comment_names_crc_and_model_id() {
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path());
    let bytes = std::fs::read(&b).unwrap();
    let raw = dir.path().join("pump.bin");
    let crc = u32::from_le_bytes(bytes[bytes.len() - 4..].try_into().unwrap());
    export(&b, &raw, &["--format", "raw"])
        .assert()
        .success()
        .stdout(predicate::str::contains(format!("CRC-32 {crc:#010x}")))
        .stdout(predicate::str::contains("sequence 7"));
    assert_eq!(std::fs::read(&raw).unwrap(), bytes);
}

#[test]
fn intel_hex_reads_back_through_objcopy_at_the_slot_address() {
    if !have("arm-none-eabi-objcopy") || !have("arm-none-eabi-objdump") {
        println!(
            "SKIPPED: arm-none-eabi-objcopy/objdump not found (Debian: apt-get install binutils-arm-none-eabi)"
        );
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path());
    let bytes = std::fs::read(&b).unwrap();
    for (args, addr) in [
        (vec!["--board", "microbit", "--slot", "B"], 0x0003_C000u32),
        (vec!["--board", "mps2-an386", "--slot", "A"], 0x0010_0000),
        (vec!["--address", "0x0001FFF0"], 0x0001_FFF0), // crosses a 64 KiB boundary
    ] {
        let hex = dir.path().join("pump.hex");
        let mut a = vec!["--format", "ihex"];
        a.extend(&args);
        export(&b, &hex, &a).assert().success();
        let bin = dir.path().join("back.bin");
        let st = Process::new("arm-none-eabi-objcopy")
            .args(["-I", "ihex", "-O", "binary"])
            .arg(&hex)
            .arg(&bin)
            .status()
            .unwrap();
        assert!(st.success(), "objcopy refused {args:?}");
        assert_eq!(std::fs::read(&bin).unwrap(), bytes, "{args:?}");
        // objdump -h: the lowest address of the file's sections is where the blob starts.
        let h = Process::new("arm-none-eabi-objdump")
            .arg("-h")
            .arg(&hex)
            .output()
            .unwrap();
        let text = String::from_utf8_lossy(&h.stdout);
        let vmas: Vec<u32> = text
            .lines()
            .filter(|l| {
                l.split_whitespace()
                    .nth(1)
                    .is_some_and(|n| n.starts_with(".sec"))
            })
            .filter_map(|l| u32::from_str_radix(l.split_whitespace().nth(3)?, 16).ok())
            .collect();
        assert_eq!(vmas.iter().min(), Some(&addr), "{args:?}: {text}");
    }
}

#[test]
fn the_c_array_compiles_and_holds_the_blob() {
    let cc = std::env::var("CC").unwrap_or_else(|_| "cc".to_string());
    if !have(&cc) {
        println!("SKIPPED: no C compiler `{cc}` found");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path());
    let bytes = std::fs::read(&b).unwrap();
    let header = dir.path().join("pump_model.h");
    export(&b, &header, &["--format", "c", "--name", "pump_model"])
        .assert()
        .success();
    let text = std::fs::read_to_string(&header).unwrap();
    let crc = u32::from_le_bytes(bytes[bytes.len() - 4..].try_into().unwrap());
    assert!(text.contains(&format!("CRC-32 {crc:#010x}")), "{text}");
    assert!(text.contains("model id 0x"), "{text}");
    // Two translation units include it (the include guard and `static` make that legal); the
    // program writes the array's bytes to a file.
    let main = dir.path().join("main.c");
    std::fs::write(
        &main,
        "#include <stdio.h>\n#include \"pump_model.h\"\n#include \"pump_model.h\"\n\
         int main(int argc, char **argv) {\n\
           if (argc != 2 || sizeof pump_model != PUMP_MODEL_LEN) return 2;\n\
           FILE *f = fopen(argv[1], \"wb\");\n\
           if (!f || fwrite(pump_model, 1, PUMP_MODEL_LEN, f) != PUMP_MODEL_LEN) return 3;\n\
           return fclose(f) != 0;\n}\n",
    )
    .unwrap();
    let exe = dir.path().join("dump");
    let out = Process::new(&cc)
        .args(["-std=c99", "-Wall", "-Wextra", "-Werror", "-o"])
        .arg(&exe)
        .arg(&main)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let dumped = dir.path().join("dumped.bin");
    assert!(Process::new(&exe).arg(&dumped).status().unwrap().success());
    assert_eq!(std::fs::read(&dumped).unwrap(), bytes);
}

#[test]
fn export_refuses_bad_blobs_bad_options_and_its_own_input() {
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path());
    let bytes = std::fs::read(&b).unwrap();
    // The output may not be the blob: refused, the blob untouched.
    export(&b, &b, &["--format", "raw"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("same file"));
    assert_eq!(std::fs::read(&b).unwrap(), bytes);
    // A corrupt blob: refused by the core's decoder, nothing written.
    let mut bad = bytes.clone();
    bad[20] ^= 0x01;
    let badp = dir.path().join("bad.blob");
    std::fs::write(&badp, &bad).unwrap();
    let out = dir.path().join("out.hex");
    export(&badp, &out, &["--format", "ihex", "--address", "0x38000"])
        .assert()
        .failure()
        .stderr(predicate::str::contains("bad.blob"))
        .stderr(predicate::str::contains("CRC mismatch"));
    assert!(!out.exists());
    // An existing output is replaced whole or not at all: a refused export leaves it as it was.
    std::fs::write(&out, "old").unwrap();
    export(&badp, &out, &["--format", "ihex", "--address", "0x38000"])
        .assert()
        .failure();
    assert_eq!(std::fs::read_to_string(&out).unwrap(), "old");
    for (args, msg) in [
        (vec!["--format", "ihex"], "needs where the blob goes"),
        (
            vec!["--format", "raw", "--address", "0x100"],
            "has no address",
        ),
        (vec!["--format", "c", "--name", "int"], "reserved in C"),
        (
            vec!["--format", "c", "--name", "9lives"],
            "not a C identifier",
        ),
        (
            vec!["--format", "ihex", "--board", "microbit", "--slot", "C"],
            "slots A and B",
        ),
        (
            vec!["--format", "ihex", "--address", "0xFFFFFFF0"],
            "32-bit address space",
        ),
    ] {
        export(&b, &dir.path().join("x.out"), &args)
            .assert()
            .failure()
            .stderr(predicate::str::contains(msg));
        assert!(!dir.path().join("x.out").exists(), "{args:?}");
    }
}

/// `ORIGIN` and `LENGTH` of a region in a memory map (`NAME : ORIGIN = 0x..., LENGTH = 16K`).
fn region(map: &str, name: &str) -> (u32, u32) {
    let line = map
        .lines()
        .find(|l| l.trim_start().starts_with(name) && l.contains("ORIGIN"))
        .unwrap_or_else(|| panic!("no {name} in the memory map"));
    let field = |k: &str| {
        let v = line.split(k).nth(1).unwrap().trim_start_matches([' ', '=']);
        let v = v.split([',', ' ']).next().unwrap();
        match v.strip_suffix('K') {
            Some(k) => k.parse::<u32>().unwrap() * 1024,
            None => u32::from_str_radix(v.trim_start_matches("0x"), 16).unwrap(),
        }
    };
    (field("ORIGIN"), field("LENGTH"))
}

#[test]
fn the_boards_slots_are_those_of_the_firmware_memory_maps() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../firmware-example/boards");
    for (board, dir) in [
        (Board::Mps2An386, "mps2_an386"),
        (Board::Microbit, "microbit"),
    ] {
        let map = std::fs::read_to_string(root.join(dir).join("memory.x")).unwrap();
        let ([a, b], size) = board.slots();
        assert_eq!(region(&map, "MODEL_A"), (a, size), "{dir}");
        assert_eq!(region(&map, "MODEL_B"), (b, size), "{dir}");
    }
}

#[test]
fn export_has_help_with_an_example() {
    ellipsoid()
        .args(["export", "--help"])
        .assert()
        .success()
        .stdout(predicate::str::contains("Examples"))
        .stdout(predicate::str::contains("--board"));
}

#[test]
fn inspect_reports_the_crc_as_the_identity_and_it_tells_threshold_variants_apart() {
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path());
    let bytes = std::fs::read(&b).unwrap();
    let crc = u32::from_le_bytes(bytes[bytes.len() - 4..].try_into().unwrap());
    ellipsoid()
        .args(["inspect", b.to_str().unwrap()])
        .assert()
        .success()
        .stdout(predicate::str::contains(format!(
            "identity: CRC-32 {crc:#010x}"
        )));
    let json = ellipsoid()
        .args(["inspect", b.to_str().unwrap(), "--json"])
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&json.stdout);
    assert!(
        text.contains(&format!("\"crc\": \"{crc:#010x}\"")),
        "{text}"
    );
    // The same baseline and sequence with another alarm budget: another threshold, another CRC.
    let other = dir.path().join("other.blob");
    ellipsoid()
        .args(["fit", dir.path().join("base.csv").to_str().unwrap()])
        .args([
            "--out",
            other.to_str().unwrap(),
            "--quiet",
            "--sequence",
            "7",
        ])
        .args(["--trained-at", "1767225600", "--alarms-per-day", "5"])
        .assert()
        .success();
    let ob = std::fs::read(&other).unwrap();
    let ocrc = u32::from_le_bytes(ob[ob.len() - 4..].try_into().unwrap());
    assert_ne!(ob, bytes, "another alarm budget must change the blob");
    assert_ne!(ocrc, crc);
}
