//! What the emulated boards share: ARM semihosting to the host. The console (the host's standard
//! output, a line at a time), the end of a run (semihosting exit, which ends the emulator with a
//! status), the panic handler, and host files read a block at a time ([`HostFile`], for a reading
//! table that does not fit in the part's memory).
//!
//! Built with the feature `semihosting`, which the emulated boards turn on. A board in the field
//! has a console of its own (RTT, a UART) and does not use this file.

use core::fmt::{self, Write};

use cortex_m_semihosting::{debug, hio, nr, syscall, syscall1};

use crate::source::ByteFile;

/// The console: semihosting standard output, written a line at a time.
pub struct Console {
    stream: Option<hio::HostStream>,
    line: [u8; 160],
    len: usize,
}

impl Console {
    /// Open the host's standard output.
    pub fn new() -> Self {
        Self {
            stream: hio::hstdout().ok(),
            line: [0; 160],
            len: 0,
        }
    }

    fn flush(&mut self) {
        if let (Some(s), Some(bytes)) = (self.stream.as_mut(), self.line.get(..self.len)) {
            let _ = s.write_all(bytes);
        }
        self.len = 0;
    }
}

impl Default for Console {
    fn default() -> Self {
        Self::new()
    }
}

impl fmt::Write for Console {
    fn write_str(&mut self, s: &str) -> fmt::Result {
        for &b in s.as_bytes() {
            if let Some(slot) = self.line.get_mut(self.len) {
                *slot = b;
                self.len += 1;
            }
            if b == b'\n' || self.len == self.line.len() {
                self.flush();
            }
        }
        Ok(())
    }
}

/// End the run: the emulator exits with status 0 (`ok`) or 1.
pub fn exit(ok: bool) -> ! {
    debug::exit(if ok {
        debug::EXIT_SUCCESS
    } else {
        debug::EXIT_FAILURE
    });
    loop {
        cortex_m::asm::wfi();
    }
}

#[panic_handler]
fn on_panic(info: &core::panic::PanicInfo<'_>) -> ! {
    let mut out = Console::new();
    let _ = writeln!(out, "panic: {info}");
    exit(false)
}

/// The longest host file name [`HostFile`] takes, in bytes.
pub const NAME_MAX: usize = 128;

/// A file name, NUL-terminated for the host, kept in a fixed buffer.
#[derive(Clone, Copy)]
pub struct FileName {
    bytes: [u8; NAME_MAX + 1],
    len: usize,
}

impl FileName {
    /// The name as text (lossy only if the host gave bytes that are not UTF-8).
    pub fn as_str(&self) -> &str {
        let b = self.bytes.get(..self.len).unwrap_or(&[]);
        core::str::from_utf8(b).unwrap_or("<not UTF-8>")
    }
}

impl fmt::Display for FileName {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Why the command line named no usable file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ArgError {
    /// The host gave no command line (`SYS_GET_CMDLINE` failed).
    NoCommandLine,
    /// The command line has no word after the image's name.
    Missing,
    /// The word is longer than [`NAME_MAX`].
    TooLong,
}

impl fmt::Display for ArgError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            ArgError::NoCommandLine => "the host gave no command line",
            ArgError::Missing => "the command line names no reading file",
            ArgError::TooLong => "the reading file's name is too long",
        })
    }
}

/// The first argument after the image's name on the semihosting command line (QEMU:
/// `-semihosting-config enable=on,arg=<image>,arg=<file>`).
pub fn first_argument() -> Result<FileName, ArgError> {
    let mut line = [0u8; 2 * NAME_MAX];
    // SYS_GET_CMDLINE: a block of the buffer's address and length; the host writes the command
    // line (NUL-terminated) and sets the length to that of the text.
    let mut block = [line.as_mut_ptr() as usize, line.len()];
    // SAFETY: the block points at `line`, which lives until the call returns, with its length;
    // the call's assembly may write memory, so the compiler reads both afresh after it.
    let r = unsafe { syscall1(nr::GET_CMDLINE, block.as_mut_ptr() as usize) };
    if r != 0 {
        return Err(ArgError::NoCommandLine);
    }
    let text = line.get(..block[1].min(line.len())).unwrap_or(&[]);
    let word = text
        .split(|b| *b == b' ' || *b == 0)
        .filter(|w| !w.is_empty())
        .nth(1)
        .ok_or(ArgError::Missing)?;
    let mut name = FileName {
        bytes: [0; NAME_MAX + 1],
        len: word.len(),
    };
    name.bytes
        .get_mut(..word.len())
        .ok_or(ArgError::TooLong)?
        .copy_from_slice(word);
    Ok(name)
}

/// A host file open for reading, in binary mode.
pub struct HostFile {
    handle: usize,
}

impl HostFile {
    /// Open `name` on the host (`SYS_OPEN`, mode "rb"); `None` if the host refused.
    pub fn open(name: &FileName) -> Option<Self> {
        // SAFETY: the name is NUL-terminated in its buffer (`bytes[len] == 0`), which lives until
        // the call returns; the length given excludes the NUL, as the call requires.
        let handle = unsafe { syscall!(OPEN, name.bytes.as_ptr(), nr::open::R_BINARY, name.len) };
        (handle != usize::MAX).then_some(Self { handle })
    }
}

impl ByteFile for HostFile {
    fn length(&mut self) -> Option<usize> {
        // SAFETY: SYS_FLEN only reads the handle.
        let n = unsafe { syscall!(FLEN, self.handle) } as isize;
        usize::try_from(n).ok()
    }

    fn read(&mut self, buf: &mut [u8]) -> Option<usize> {
        // SAFETY: the host writes at most `buf.len()` bytes into `buf`. SYS_READ returns the
        // number of bytes *not* read.
        let left = unsafe { syscall!(READ, self.handle, buf.as_mut_ptr(), buf.len()) };
        buf.len().checked_sub(left)
    }
}

impl Drop for HostFile {
    fn drop(&mut self) {
        // SAFETY: SYS_CLOSE only takes the handle.
        let _ = unsafe { syscall!(CLOSE, self.handle) };
    }
}
