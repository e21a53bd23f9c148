//! Line counting and splitting a file into ranges on line boundaries, with `memchr`.

use std::fs::File;
use std::io::{self, Read, Seek, SeekFrom};
use std::path::Path;

pub(super) const CHUNK: usize = 1 << 18;

/// Data lines from `start` to `end` (a last line without a line end counts).
pub fn count_lines(path: &Path, start: u64, end: u64) -> io::Result<u64> {
    let mut f = File::open(path)?;
    f.seek(SeekFrom::Start(start))?;
    let mut f = f.take(end - start);
    let mut buf = vec![0u8; CHUNK];
    let mut lines = 0u64;
    let mut last = b'\n';
    loop {
        let n = f.read(&mut buf)?;
        if n == 0 {
            break;
        }
        lines += memchr::memchr_iter(b'\n', &buf[..n]).count() as u64;
        last = buf[n - 1];
    }
    if last != b'\n' {
        lines += 1;
    }
    Ok(lines)
}

/// The byte offset just after the `n`-th line end from `start` (`start` itself for 0).
pub fn nth_line_start(path: &Path, start: u64, n: u64) -> io::Result<u64> {
    if n == 0 {
        return Ok(start);
    }
    let mut f = File::open(path)?;
    f.seek(SeekFrom::Start(start))?;
    let mut buf = vec![0u8; CHUNK];
    let mut pos = start;
    let mut seen = 0u64;
    loop {
        let got = f.read(&mut buf)?;
        if got == 0 {
            return Ok(pos);
        }
        for i in memchr::memchr_iter(b'\n', &buf[..got]) {
            seen += 1;
            if seen == n {
                return Ok(pos + i as u64 + 1);
            }
        }
        pos += got as u64;
    }
}

/// Cut `start..end` into at most `parts` byte ranges that begin and end on line boundaries, for
/// parallel readers ([`Reader::range`](super::Reader::range)): `parts + 1` or fewer increasing offsets from `start` to `end`, each (but the ends) just after a `\n`.
pub fn split_ranges(path: &Path, start: u64, end: u64, parts: usize) -> io::Result<Vec<u64>> {
    let mut bounds = vec![start];
    if parts > 1 && end > start {
        let mut f = File::open(path)?;
        let mut buf = vec![0u8; 1 << 16];
        for k in 1..parts {
            let target = start + (end - start) * k as u64 / parts as u64;
            let prev = *bounds.last().expect("not empty");
            if target <= prev {
                continue;
            }
            // The first line start at or after `target`: after the first `\n` at `target − 1` or later.
            let mut pos = target - 1;
            f.seek(SeekFrom::Start(pos))?;
            let cut = loop {
                let got = f.read(&mut buf)?;
                if got == 0 {
                    break end;
                }
                if let Some(i) = memchr::memchr(b'\n', &buf[..got]) {
                    break (pos + i as u64 + 1).min(end);
                }
                pos += got as u64;
            };
            if cut > prev && cut < end {
                bounds.push(cut);
            }
        }
    }
    bounds.push(end);
    Ok(bounds)
}
