//! `ellipsoid export`: write a blob in a form a flash programmer or a C build takes.
//!
//! * `--format c`: a C array, ready to be a header: an include guard, `#define NAME_LEN`, and
//!   `static const uint8_t NAME[NAME_LEN] = {...};`, with the blob's model id, sequence and CRC in a
//!   comment above it.
//! * `--format ihex`: Intel HEX (Intel, "Hexadecimal Object File Format Specification", revision
//!   A, 6 January 1988): the blob's bytes in data records (type 00) of 16 bytes, placed at
//!   `--address` or at a named slot of a named board (`--board microbit --slot A`), with extended
//!   linear address records (type 04) for the upper 16 bits of the address, and an end-of-file
//!   record (type 01). No start address record: the file is data, not a program.
//! * `--format raw`: the blob's bytes unchanged.
//!
//! The blob is validated by the core's decoder before anything is written, the output may not be
//! the blob itself (or its card), and it is written all-or-nothing (staged beside its target and
//! renamed into place).

use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::{bail, ensure, Context, Result};
use clap::{Args, ValueEnum};

use crate::data::card::ModelCard;
use crate::data::output;
use crate::data::paths::{refuse_clashes, Role};
use crate::device::dims::read_blob_file;

/// The forms `export` writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Format {
    /// A C array with its length, usable as a header.
    C,
    /// Intel HEX at a slot's address.
    Ihex,
    /// The blob's bytes.
    Raw,
}

/// Options of `export`.
#[derive(Debug, Clone, Args)]
pub struct ExportArgs {
    /// The blob.
    pub blob: PathBuf,
    /// What to write.
    #[arg(long, value_enum)]
    pub format: Format,
    /// The file to write.
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,
    /// `c`: the array's name, a C identifier (its length is `NAME_LEN`, upper case).
    #[arg(long, default_value = "ellipsoid_model", value_name = "IDENT")]
    pub name: String,
    /// `ihex`: the address of the blob's first byte (`0x...` or decimal).
    #[arg(long, value_name = "ADDR", value_parser = parse_address, conflicts_with_all = ["board", "slot"])]
    pub address: Option<u32>,
    /// `ihex`: a board whose slot the blob goes to (with `--slot`).
    #[arg(long, value_enum, requires = "slot")]
    pub board: Option<Board>,
    /// `ihex`: the slot of `--board`, `A` or `B`.
    #[arg(long, value_name = "A|B", requires = "board")]
    pub slot: Option<String>,
}

/// The boards of `firmware-example/`, whose slots `--board`/`--slot` name.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Board {
    /// The emulated Arm MPS2 AN386 (`firmware-example/boards/mps2_an386/memory.x`).
    #[value(name = "mps2-an386")]
    Mps2An386,
    /// The BBC micro:bit (`firmware-example/boards/microbit/memory.x`).
    Microbit,
}

impl Board {
    /// The slots' start addresses and their size, as the board's memory map gives them (a test
    /// reads the memory maps and compares).
    pub const fn slots(self) -> ([u32; 2], u32) {
        match self {
            Board::Mps2An386 => ([0x0010_0000, 0x0010_4000], 16 * 1024),
            Board::Microbit => ([0x0003_8000, 0x0003_C000], 16 * 1024),
        }
    }

    /// The board's name, as its cargo feature spells it.
    pub const fn name(self) -> &'static str {
        match self {
            Board::Mps2An386 => "mps2-an386",
            Board::Microbit => "microbit",
        }
    }
}

/// The `--address` value parser: `0x` hexadecimal or decimal, 32 bits.
fn parse_address(s: &str) -> Result<u32, String> {
    let t = s.trim();
    let r = match t.strip_prefix("0x").or_else(|| t.strip_prefix("0X")) {
        Some(h) => u32::from_str_radix(&h.replace('_', ""), 16),
        None => t.replace('_', "").parse::<u32>(),
    };
    r.map_err(|_| format!("`{s}` is not a 32-bit address (write 0x00038000 or 229376)"))
}

/// C keywords (C17 and C23) and the names `stdint.h` defines, which the array may not take.
const RESERVED: [&str; 54] = [
    "auto",
    "break",
    "case",
    "char",
    "const",
    "continue",
    "default",
    "do",
    "double",
    "else",
    "enum",
    "extern",
    "float",
    "for",
    "goto",
    "if",
    "inline",
    "int",
    "long",
    "register",
    "restrict",
    "return",
    "short",
    "signed",
    "sizeof",
    "static",
    "struct",
    "switch",
    "typedef",
    "union",
    "unsigned",
    "void",
    "volatile",
    "while",
    "bool",
    "true",
    "false",
    "nullptr",
    "alignas",
    "alignof",
    "constexpr",
    "static_assert",
    "thread_local",
    "typeof",
    "uint8_t",
    "uint16_t",
    "uint32_t",
    "uint64_t",
    "int8_t",
    "int16_t",
    "int32_t",
    "int64_t",
    "size_t",
    "NULL",
];

/// Check that `name` is a C identifier the array can take.
fn check_c_name(name: &str) -> Result<()> {
    let mut chars = name.chars();
    let ok_first = chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_');
    let ok_rest = chars.all(|c| c.is_ascii_alphanumeric() || c == '_');
    ensure!(
        ok_first && ok_rest,
        "--name `{name}` is not a C identifier (letters, digits and `_`, not starting with a digit)"
    );
    ensure!(
        !RESERVED.contains(&name) && !name.starts_with("__"),
        "--name `{name}` is reserved in C; choose another name"
    );
    Ok(())
}

/// What the comment says about the blob.
pub struct BlobFacts {
    /// Features.
    pub n: usize,
    /// `ModelMeta::model_id`.
    pub model_id: u32,
    /// `ModelMeta::sequence`.
    pub sequence: u32,
    /// The CRC-32 in the blob's last four bytes.
    pub crc: u32,
}

/// The blob as a C array: an include guard, `NAME_LEN`, the array, 12 bytes a line.
pub fn c_array(bytes: &[u8], name: &str, facts: &BlobFacts, source: &str) -> Result<String> {
    check_c_name(name)?;
    let upper = name.to_ascii_uppercase();
    let mut s = String::new();
    writeln!(
        s,
        "/* Ellipsoid model blob, written by `ellipsoid export` from {source}."
    )?;
    writeln!(
        s,
        "   {} features, model id {:#010x}, sequence {}, CRC-32 {:#010x} (the blob's last four",
        facts.n, facts.model_id, facts.sequence, facts.crc
    )?;
    writeln!(
        s,
        "   bytes, little-endian). Write it to a model slot unchanged. */"
    )?;
    writeln!(s, "#ifndef {upper}_H")?;
    writeln!(s, "#define {upper}_H\n")?;
    writeln!(s, "#include <stdint.h>\n")?;
    writeln!(s, "#define {upper}_LEN {}u\n", bytes.len())?;
    writeln!(s, "static const uint8_t {name}[{upper}_LEN] = {{")?;
    for chunk in bytes.chunks(12) {
        let line: Vec<String> = chunk.iter().map(|b| format!("0x{b:02x}")).collect();
        writeln!(s, "    {},", line.join(", "))?;
    }
    writeln!(s, "}};\n")?;
    writeln!(s, "#endif /* {upper}_H */")?;
    Ok(s)
}

/// Data bytes per Intel HEX data record (16 is common practice; the format allows up to 255).
const IHEX_RECORD: usize = 16;

/// One Intel HEX record: `:`, byte count, 16-bit offset, type, data, and the checksum, the two's
/// complement of the sum of every byte before it (Intel HEX specification, rev. A, 1988).
fn ihex_record(out: &mut String, offset: u16, kind: u8, data: &[u8]) -> Result<()> {
    let len = u8::try_from(data.len()).context("an Intel HEX record holds at most 255 bytes")?;
    let [hi, lo] = offset.to_be_bytes();
    let mut sum = len.wrapping_add(hi).wrapping_add(lo).wrapping_add(kind);
    write!(out, ":{len:02X}{offset:04X}{kind:02X}")?;
    for b in data {
        write!(out, "{b:02X}")?;
        sum = sum.wrapping_add(*b);
    }
    writeln!(out, "{:02X}", sum.wrapping_neg())?;
    Ok(())
}

/// The blob as Intel HEX with its first byte at `address`.
pub fn intel_hex(bytes: &[u8], address: u32) -> Result<String> {
    let last = u64::from(address) + bytes.len() as u64;
    ensure!(
        last <= 1 << 32,
        "the blob ({} bytes) at {address:#010x} would run past the 32-bit address space",
        bytes.len()
    );
    let mut s = String::new();
    let mut upper: Option<u16> = None;
    let mut at = 0usize;
    while at < bytes.len() {
        let addr = address as u64 + at as u64;
        let (hi, lo) = ((addr >> 16) as u16, (addr & 0xFFFF) as u16);
        if upper != Some(hi) {
            ihex_record(&mut s, 0, 0x04, &hi.to_be_bytes())?;
            upper = Some(hi);
        }
        // A record never crosses a 64 KiB boundary: its 16-bit offset would wrap.
        let room = 0x1_0000 - usize::from(lo);
        let take = IHEX_RECORD.min(room).min(bytes.len() - at);
        ihex_record(&mut s, lo, 0x00, &bytes[at..at + take])?;
        at += take;
    }
    ihex_record(&mut s, 0, 0x01, &[])?;
    Ok(s)
}

/// Run `export`.
pub fn run(a: &ExportArgs) -> Result<()> {
    let card = ModelCard::path_for(&a.blob);
    refuse_clashes(
        &[
            Role::new("the blob", &a.blob),
            Role::new("the model card", &card),
        ],
        &[Role::new("--out", &a.out)],
    )?;
    let placement = match (a.format, a.address, a.board, a.slot.as_deref()) {
        (Format::Ihex, Some(addr), None, None) => Some((addr, None)),
        (Format::Ihex, None, Some(board), Some(slot)) => {
            let ([sa, sb], size) = board.slots();
            let at = match slot {
                "A" | "a" => sa,
                "B" | "b" => sb,
                other => bail!("--slot `{other}`: the boards have slots A and B"),
            };
            Some((at, Some((board, slot.to_ascii_uppercase(), size))))
        }
        (Format::Ihex, None, None, None) => {
            bail!(
                "--format ihex needs where the blob goes: --address 0x... or --board B --slot A|B"
            )
        }
        (Format::Ihex, ..) => bail!("give either --address or --board with --slot, not both"),
        (_, None, None, None) => None,
        (f, ..) => bail!(
            "--address, --board and --slot place an Intel HEX file; --format {} has no address",
            if f == Format::C { "c" } else { "raw" }
        ),
    };
    if a.format == Format::C {
        check_c_name(&a.name)?;
    }
    let settled = output::settle(&a.blob)?;
    // Either format: a model bank (format 2) goes to its slot as it is, like a single model.
    let (bytes, decoded) = read_blob_file(&a.blob)?;
    drop(settled);
    let meta = decoded.meta();
    let crc_bytes: [u8; 4] = bytes
        .get(bytes.len().saturating_sub(4)..)
        .and_then(|b| b.try_into().ok())
        .context("a decoded blob has a CRC")?;
    let facts = BlobFacts {
        n: decoded.n(),
        model_id: meta.model_id,
        sequence: meta.sequence,
        crc: u32::from_le_bytes(crc_bytes),
    };
    let text = match (a.format, &placement) {
        (Format::C, _) => {
            let source = a.blob.file_name().map_or_else(
                || a.blob.display().to_string(),
                |f| f.to_string_lossy().into_owned(),
            );
            c_array(&bytes, &a.name, &facts, &source)?.into_bytes()
        }
        (Format::Ihex, Some((addr, slot))) => {
            if let Some((board, name, size)) = slot {
                ensure!(
                    bytes.len() as u64 <= u64::from(*size),
                    "the blob ({} bytes) does not fit in slot {name} of {} ({size} bytes)",
                    bytes.len(),
                    board.name()
                );
            }
            intel_hex(&bytes, *addr)?.into_bytes()
        }
        (Format::Ihex, None) => bail!("--format ihex needs --address or --board with --slot"),
        (Format::Raw, _) => bytes.clone(),
    };
    output::write_bytes(&a.out, &text)
        .with_context(|| format!("cannot write {}", a.out.display()))?;
    let what = match (a.format, placement) {
        (Format::C, _) => format!("a C array `{}` ({} bytes)", a.name, bytes.len()),
        (Format::Ihex, Some((addr, Some((board, slot, _))))) => format!(
            "Intel HEX at {addr:#010x} (slot {slot} of {})",
            board.name()
        ),
        (Format::Ihex, Some((addr, None))) => format!("Intel HEX at {addr:#010x}"),
        (Format::Ihex, None) | (Format::Raw, _) => format!("{} raw bytes", bytes.len()),
    };
    println!(
        "{}: {what}, model id {:#010x}, sequence {}, CRC-32 {:#010x}",
        a.out.display(),
        facts.model_id,
        facts.sequence,
        facts.crc
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Read an Intel HEX file back into (address, byte) pairs, checking every checksum.
    fn parse_ihex(text: &str) -> Vec<(u32, u8)> {
        let mut upper = 0u32;
        let mut out = Vec::new();
        for line in text.lines() {
            let hex = line.strip_prefix(':').unwrap();
            let raw: Vec<u8> = (0..hex.len())
                .step_by(2)
                .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).unwrap())
                .collect();
            let sum = raw.iter().fold(0u8, |s, b| s.wrapping_add(*b));
            assert_eq!(sum, 0, "checksum of {line}");
            let len = usize::from(raw[0]);
            assert_eq!(raw.len(), len + 5, "{line}");
            let offset = u32::from(u16::from_be_bytes([raw[1], raw[2]]));
            match raw[3] {
                0x00 => {
                    for (k, b) in raw[4..4 + len].iter().enumerate() {
                        out.push((upper + offset + k as u32, *b));
                    }
                }
                0x01 => break,
                0x04 => upper = u32::from(u16::from_be_bytes([raw[4], raw[5]])) << 16,
                t => panic!("record type {t}"),
            }
        }
        out
    }

    #[test]
    fn ihex_records_match_hand_computed_ones() {
        // Checksums by hand, from the specification's rule (two's complement of the byte sum):
        // 02 + 00 + 00 + 04 + 00 + 03 = 0x09 → 0xF7; 03 + 80 + 00 + 00 + 01 + 02 + 03 = 0x89 →
        // 0x77; 00 + 00 + 00 + 01 = 0x01 → 0xFF (the end-of-file record every file ends with).
        let s = intel_hex(&[1, 2, 3], 0x0003_8000).unwrap();
        assert_eq!(s, ":020000040003F7\n:0380000001020377\n:00000001FF\n");
    }

    #[test]
    fn ihex_splits_at_16_bytes_and_at_64k_boundaries() {
        let bytes: Vec<u8> = (0..=255u8).cycle().take(70).collect();
        // 0x1FFF8: 8 bytes before the 64 KiB boundary, then a new extended address record.
        let s = intel_hex(&bytes, 0x0001_FFF8).unwrap();
        let lines: Vec<&str> = s.lines().collect();
        assert_eq!(lines[0], ":020000040001F9");
        assert!(lines[1].starts_with(":08FFF800"), "{}", lines[1]);
        assert_eq!(lines[2], ":020000040002F8");
        assert!(lines[3].starts_with(":10000000"), "{}", lines[3]);
        assert_eq!(*lines.last().unwrap(), ":00000001FF");
        let back = parse_ihex(&s);
        assert_eq!(back.len(), bytes.len());
        for (k, (addr, b)) in back.iter().enumerate() {
            assert_eq!((*addr, *b), (0x0001_FFF8 + k as u32, bytes[k]));
        }
        assert!(intel_hex(&[0; 4], 0xFFFF_FFFE).is_err());
        assert!(intel_hex(&[0; 2], 0xFFFF_FFFE).is_ok());
    }

    #[test]
    fn c_names_are_checked() {
        for bad in ["", "1abc", "a-b", "int", "uint8_t", "__x", "é"] {
            assert!(check_c_name(bad).is_err(), "{bad:?}");
        }
        for good in ["ellipsoid_model", "_pump2", "M"] {
            check_c_name(good).unwrap();
        }
    }

    #[test]
    fn addresses_parse() {
        assert_eq!(parse_address("0x00038000"), Ok(0x38000));
        assert_eq!(parse_address("0X3_C000"), Ok(0x3C000));
        assert_eq!(parse_address("229376"), Ok(0x38000));
        assert!(parse_address("0x1_0000_0000").is_err());
        assert!(parse_address("slot").is_err());
    }
}
