//! Exact encodings shared by the documents lossprism writes and reads back: FNV-1a hashes for
//! fingerprints and checksums, and floats packed as the hex of their bits (a round trip is exact
//! to the bit).

/// 64-bit FNV-1a hash (Fowler, Noll, Vo), offset basis 0xcbf29ce484222325, prime 0x100000001b3.
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        h ^= b as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Packs floats as hex strings of their bit patterns, 16 lowercase digits per value.
pub fn pack_f64(values: &[f64]) -> String {
    let mut s = String::with_capacity(values.len() * 16);
    for v in values {
        s.push_str(&format!("{:016x}", v.to_bits()));
    }
    s
}

/// Unpacks [`pack_f64`]'s output; `expect` is the number of values required.
pub fn unpack_f64(s: &str, expect: usize) -> Result<Vec<f64>, String> {
    if !s.is_ascii() || Some(s.len()) != expect.checked_mul(16) {
        return Err(format!(
            "expected {expect} packed values ({} hex digits), found {} characters",
            expect * 16,
            s.len()
        ));
    }
    (0..expect)
        .map(|i| {
            u64::from_str_radix(&s[i * 16..(i + 1) * 16], 16)
                .map(f64::from_bits)
                .map_err(|_| format!("value {i} is not 16 hex digits"))
        })
        .collect()
}

const B64: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";

/// Standard base64 (RFC 4648, with `=` padding) of `bytes`.
pub fn base64(bytes: &[u8]) -> String {
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for chunk in bytes.chunks(3) {
        let b = [
            chunk[0],
            *chunk.get(1).unwrap_or(&0),
            *chunk.get(2).unwrap_or(&0),
        ];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        out.push(B64[(n >> 18) as usize & 63] as char);
        out.push(B64[(n >> 12) as usize & 63] as char);
        out.push(if chunk.len() > 1 {
            B64[(n >> 6) as usize & 63] as char
        } else {
            '='
        });
        out.push(if chunk.len() > 2 {
            B64[n as usize & 63] as char
        } else {
            '='
        });
    }
    out
}

/// Decodes [`base64`]'s output; an error says what is wrong.
pub fn unbase64(s: &str) -> Result<Vec<u8>, String> {
    let s = s.as_bytes();
    if s.len() % 4 != 0 {
        return Err(format!(
            "base64 text of {} characters is not a multiple of 4",
            s.len()
        ));
    }
    let val = |c: u8| -> Result<u32, String> {
        match c {
            b'A'..=b'Z' => Ok(u32::from(c - b'A')),
            b'a'..=b'z' => Ok(u32::from(c - b'a') + 26),
            b'0'..=b'9' => Ok(u32::from(c - b'0') + 52),
            b'+' => Ok(62),
            b'/' => Ok(63),
            _ => Err(format!("`{}` is not a base64 character", c as char)),
        }
    };
    let mut out = Vec::with_capacity(s.len() / 4 * 3);
    for (i, q) in s.chunks(4).enumerate() {
        let last = i + 1 == s.len() / 4;
        let pad = q.iter().rev().take_while(|&&c| c == b'=').count();
        if pad > 2 || (pad > 0 && !last) {
            return Err("misplaced `=` padding in base64 text".into());
        }
        let mut n = 0u32;
        for &c in &q[..4 - pad] {
            n = (n << 6) | val(c)?;
        }
        n <<= 6 * pad as u32;
        let bytes = [(n >> 16) as u8, (n >> 8) as u8, n as u8];
        out.extend_from_slice(&bytes[..3 - pad]);
    }
    Ok(out)
}

/// Packs floats as base64 of their little-endian IEEE bytes (exact to the bit).
pub fn pack_floats(values: &[f64]) -> String {
    let mut bytes = Vec::with_capacity(values.len() * 8);
    for v in values {
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    base64(&bytes)
}

/// Unpacks [`pack_floats`]'s output; `expect` is the number of values required.
pub fn unpack_floats(s: &str, expect: usize) -> Result<Vec<f64>, String> {
    let want = expect
        .checked_mul(8)
        .and_then(|b| b.checked_add(2))
        .map(|b| b / 3 * 4)
        .ok_or_else(|| "array size overflows".to_string())?;
    if s.len() != want {
        return Err(format!(
            "expected {expect} packed values ({want} base64 characters), found {} characters",
            s.len()
        ));
    }
    let bytes = unbase64(s)?;
    if bytes.len() != expect * 8 {
        return Err(format!(
            "expected {expect} packed values, found {} bytes",
            bytes.len()
        ));
    }
    Ok(bytes
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
        .collect())
}

/// Reads a text document of at most `limit` bytes: refused on its size before reading, and
/// while reading (a device or a pipe that never ends is refused too). The first block read
/// (up to 64 KiB) must hold no NUL byte (binary data is no document) and pass `head`, so junk
/// of the wrong shape is refused before the rest is read. Errors name the path and `what`
/// (`scenario file`, `part document`, ...).
pub fn read_document(
    path: &std::path::Path,
    limit: u64,
    what: &str,
    head: &dyn Fn(&[u8]) -> Result<(), String>,
) -> Result<String, crate::error::Error> {
    use std::io::Read;
    let shown = path.display();
    let refuse = |m: String| crate::error::Error::Usage(format!("{shown}: {m}"));
    let meta = std::fs::metadata(path).map_err(|e| crate::error::Error::io(path, &e))?;
    crate::output::register_input(path);
    if meta.is_dir() {
        return Err(refuse(format!("is a folder, not a {what}")));
    }
    if meta.is_file() && meta.len() > limit {
        return Err(refuse(format!(
            "{} bytes, larger than any {what} lossprism reads ({limit} at most)",
            meta.len()
        )));
    }
    let file = open_input(path).map_err(|e| crate::error::Error::io(path, &e))?;
    let mut r = file.take(limit.saturating_add(1));
    let mut bytes = Vec::new();
    let mut chunk = vec![0u8; 1 << 16];
    let mut first = true;
    loop {
        let n = match r.read(&mut chunk) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(crate::error::Error::io(path, &e)),
        };
        bytes.extend_from_slice(&chunk[..n]);
        if first && (bytes.len() >= 1 << 16 || n < chunk.len()) {
            first = false;
            let probe = &bytes[..bytes.len().min(1 << 16)];
            if probe.contains(&0) {
                return Err(refuse(format!(
                    "holds binary data (a NUL byte), not a {what}"
                )));
            }
            head(probe).map_err(|m| refuse(format!("not a {what}: {m}")))?;
        }
        if bytes.len() as u64 > limit {
            return Err(refuse(format!(
                "more than {limit} bytes, larger than any {what} lossprism reads"
            )));
        }
    }
    if first {
        if bytes.contains(&0) {
            return Err(refuse(format!(
                "holds binary data (a NUL byte), not a {what}"
            )));
        }
        head(&bytes).map_err(|m| refuse(format!("not a {what}: {m}")))?;
    }
    // A byte-order mark (an editor's, on Windows) is not part of the text: JSON and TOML
    // parsers refused it as an invalid character at line 1, column 1.
    if bytes.starts_with(b"\xef\xbb\xbf") {
        bytes.drain(..3);
    }
    String::from_utf8(bytes).map_err(|e| {
        refuse(format!(
            "not UTF-8 text (invalid byte at offset {}), not a {what}",
            e.utf8_error().valid_up_to()
        ))
    })
}

/// The memory available to this process in bytes: `MemAvailable` of `/proc/meminfo` (else
/// `MemTotal`), lowered by the cgroup (v2) limit minus current use when one is set; `None` when
/// neither can be read.
pub fn available_memory() -> Option<u64> {
    let meminfo = std::fs::read_to_string("/proc/meminfo").ok();
    let field = |name: &str| -> Option<u64> {
        meminfo.as_deref()?.lines().find_map(|l| {
            let rest = l.strip_prefix(name)?.strip_prefix(':')?;
            let kb: u64 = rest.trim().trim_end_matches("kB").trim().parse().ok()?;
            Some(kb.saturating_mul(1024))
        })
    };
    let machine = field("MemAvailable").or_else(|| field("MemTotal"));
    let cgroup = (|| {
        let max: u64 = std::fs::read_to_string("/sys/fs/cgroup/memory.max")
            .ok()?
            .trim()
            .parse()
            .ok()?;
        let cur: u64 = std::fs::read_to_string("/sys/fs/cgroup/memory.current")
            .ok()?
            .trim()
            .parse()
            .unwrap_or(0);
        Some(max.saturating_sub(cur))
    })();
    match (machine, cgroup) {
        (Some(a), Some(b)) => Some(a.min(b)),
        (a, b) => a.or(b),
    }
}

/// Seconds an input FIFO may take to get a writer, and then to send more bytes or close, before
/// it is refused.
pub const FIFO_WAIT_SECONDS: u64 = 10;

/// An opened input: a file, or a FIFO read through a pump thread so that a writer that falls
/// silent without closing is an error after [`FIFO_WAIT_SECONDS`] instead of a hang.
pub enum Input {
    /// A regular file (or anything that is not a FIFO).
    File(std::fs::File),
    /// A FIFO: chunks as its pump thread read them, an empty chunk at the end.
    Fifo {
        /// Chunks from the pump thread.
        rx: std::sync::mpsc::Receiver<std::io::Result<Vec<u8>>>,
        /// The current chunk and how much of it was handed out.
        chunk: (Vec<u8>, usize),
        /// The writer closed (end of input).
        done: bool,
    },
}

impl std::io::Read for Input {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        match self {
            Input::File(f) => f.read(buf),
            Input::Fifo { rx, chunk, done } => {
                while chunk.1 >= chunk.0.len() {
                    if *done {
                        return Ok(0);
                    }
                    let wait = std::time::Duration::from_secs(FIFO_WAIT_SECONDS);
                    match rx.recv_timeout(wait) {
                        Ok(Ok(c)) if c.is_empty() => *done = true,
                        Ok(Ok(c)) => *chunk = (c, 0),
                        Ok(Err(e)) => return Err(e),
                        Err(std::sync::mpsc::RecvTimeoutError::Disconnected) => {
                            return Err(std::io::Error::other(
                                "the FIFO's reading thread stopped before the end of input",
                            ))
                        }
                        Err(std::sync::mpsc::RecvTimeoutError::Timeout) => {
                            return Err(std::io::Error::new(
                                std::io::ErrorKind::TimedOut,
                                format!(
                                    "a FIFO whose writer sent nothing for {FIFO_WAIT_SECONDS} s without closing it"
                                ),
                            ))
                        }
                    }
                }
                let n = buf.len().min(chunk.0.len() - chunk.1);
                buf[..n].copy_from_slice(&chunk.0[chunk.1..chunk.1 + n]);
                chunk.1 += n;
                Ok(n)
            }
        }
    }
}

/// Opens an input file for reading. A FIFO blocks its reader until something writes to it: a
/// FIFO that gets no writer within [`FIFO_WAIT_SECONDS`], or whose writer then sends nothing
/// for that long without closing, is an error instead of a hang (the pump thread left blocked
/// ends with the process).
pub fn open_input(path: &std::path::Path) -> std::io::Result<Input> {
    use std::io::Read;
    use std::os::unix::fs::FileTypeExt;
    let is_fifo = std::fs::metadata(path)
        .map(|m| m.file_type().is_fifo())
        .unwrap_or(false);
    if !is_fifo {
        return std::fs::File::open(path).map(Input::File);
    }
    let (open_tx, open_rx) = std::sync::mpsc::channel();
    // At most a few chunks ahead of the reader: memory stays bounded whatever the writer sends.
    let (tx, rx) = std::sync::mpsc::sync_channel(4);
    let p = path.to_path_buf();
    std::thread::spawn(move || {
        let mut f = match std::fs::File::open(p) {
            Ok(f) => {
                let _ = open_tx.send(Ok(()));
                f
            }
            Err(e) => {
                let _ = open_tx.send(Err(e));
                return;
            }
        };
        loop {
            let mut c = vec![0u8; 1 << 16];
            match f.read(&mut c) {
                Ok(n) => {
                    c.truncate(n);
                    if tx.send(Ok(c)).is_err() || n == 0 {
                        return;
                    }
                }
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                Err(e) => {
                    let _ = tx.send(Err(e));
                    return;
                }
            }
        }
    });
    match open_rx.recv_timeout(std::time::Duration::from_secs(FIFO_WAIT_SECONDS)) {
        Ok(Ok(())) => Ok(Input::Fifo {
            rx,
            chunk: (Vec::new(), 0),
            done: false,
        }),
        Ok(Err(e)) => Err(e),
        Err(_) => Err(std::io::Error::new(
            std::io::ErrorKind::TimedOut,
            format!("a FIFO that nothing wrote to within {FIFO_WAIT_SECONDS} s"),
        )),
    }
}

/// A head check for [`read_document`]: anything goes.
pub fn any_text(_: &[u8]) -> Result<(), String> {
    Ok(())
}

/// A head check for [`read_document`]: a JSON object (the first character after blank space is
/// `{`), as every JSON document lossprism writes is.
pub fn json_object(head: &[u8]) -> Result<(), String> {
    let skip = head.strip_prefix(b"\xef\xbb\xbf").unwrap_or(head);
    match skip.iter().find(|b| !b.is_ascii_whitespace()) {
        Some(b'{') => Ok(()),
        Some(b) => Err(format!(
            "a JSON object (`{{ ... }}`) was expected, the text starts with `{}`",
            char::from(*b).escape_default()
        )),
        None if skip.is_empty() => Err("the file is empty".into()),
        // Only blank space as far as the probe reaches: the whole file when it is shorter than
        // a probe (a blank file), else the parse of the whole text decides (a valid document
        // after 64 KiB of blank lines was refused as "empty").
        None if head.len() < 1 << 16 => Err("the file holds only blank space".into()),
        None => Ok(()),
    }
}

/// The top-level `format` and `version` fields of a JSON document, read without building the
/// document: every other value is skipped as it is parsed, so memory stays small whatever the
/// document holds.
#[derive(Debug, Clone, Default, serde::Deserialize)]
pub struct JsonHead {
    /// The `format` field, when present.
    #[serde(default)]
    pub format: Option<serde_json::Value>,
    /// The `version` field, when present.
    #[serde(default)]
    pub version: Option<serde_json::Value>,
    /// The `checkpoint` field of a part document, when present.
    #[serde(default)]
    pub checkpoint: Option<serde_json::Value>,
}

impl JsonHead {
    /// Reads the head of a JSON object; the error is serde_json's one-line message.
    pub fn of(text: &str) -> Result<JsonHead, String> {
        json_object(text.as_bytes())?;
        serde_json::from_str(text).map_err(|e| format!("invalid JSON: {e}"))
    }

    /// The `format` field when it is a string.
    pub fn format(&self) -> Option<&str> {
        self.format.as_ref().and_then(serde_json::Value::as_str)
    }

    /// The `version` field when it is a string.
    pub fn version(&self) -> Option<&str> {
        self.version.as_ref().and_then(serde_json::Value::as_str)
    }

    /// The document says it is a checkpoint (`"checkpoint": true`).
    pub fn is_checkpoint(&self) -> bool {
        self.checkpoint
            .as_ref()
            .and_then(serde_json::Value::as_bool)
            == Some(true)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a64_matches_the_published_test_vectors() {
        // Source: FNV test vectors of Fowler, Noll and Vo (64-bit FNV-1a of "" and "a", as listed
        // in the FNV reference code's test suite and draft-eastlake-fnv).
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a64(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[test]
    fn base64_matches_the_rfc_4648_test_vectors() {
        // Source: RFC 4648, §10 (test vectors).
        for (plain, enc) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(plain.as_bytes()), enc);
            assert_eq!(unbase64(enc).unwrap(), plain.as_bytes());
        }
        assert!(unbase64("Zm9").is_err());
        assert!(unbase64("Zm=v").is_err());
        assert!(unbase64("Zm9*").is_err());
        let v = [1.5, -0.0, f64::NAN, 1e-310];
        let back = unpack_floats(&pack_floats(&v), 4).unwrap();
        assert!(v.iter().zip(&back).all(|(a, b)| a.to_bits() == b.to_bits()));
        assert!(unpack_floats(&pack_floats(&v), 3).is_err());
    }

    #[test]
    fn packed_floats_round_trip_to_the_bit() {
        let vals = [
            0.0,
            -0.0,
            1.0 / 3.0,
            f64::MIN_POSITIVE / 7.0, // subnormal
            f64::MAX,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
            -1.234_567_890_123_456_7e-300,
            0.1 + 0.2,
        ];
        let s = pack_f64(&vals);
        assert_eq!(s.len(), vals.len() * 16);
        let back = unpack_f64(&s, vals.len()).unwrap();
        for (a, b) in vals.iter().zip(&back) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
        assert!(unpack_f64(&s, vals.len() - 1).is_err());
        assert!(unpack_f64(&s.replace('0', "g"), vals.len()).is_err());
        assert!(unpack_f64("é", 0).is_err());
    }
}
