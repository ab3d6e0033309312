//! Session recordings: a magic prefix, then length- and CRC-framed `SessionRecord`s.
//! The reader works on bytes: a short or corrupt final record is reported as a torn tail, and
//! every complete record before it is returned.

use crate::crc32::crc32;
use crate::v1::{SessionHeader, SessionRecord};
use prost::Message;
use std::io::Write;

/// Magic prefix of a session file.
pub const SESSION_MAGIC: &[u8; 8] = b"APXSESS1";
/// Session format version written in the header record.
pub const SESSION_FORMAT_VERSION: u32 = 1;
/// Largest record accepted when reading (guards against a corrupt length).
pub const MAX_RECORD: usize = 64 << 20;

/// Frames one record: length, CRC, payload.
pub fn frame_record(rec: &SessionRecord, out: &mut Vec<u8>) {
    let payload = rec.encode_to_vec();
    out.extend_from_slice(&(payload.len() as u32).to_le_bytes());
    out.extend_from_slice(&crc32(&payload).to_le_bytes());
    out.extend_from_slice(&payload);
}

/// Appends records to any writer. The caller decides when to flush (the daemon: every 100 ms
/// and at each trial end).
pub struct SessionWriter<W: Write> {
    w: W,
    buf: Vec<u8>,
}

impl<W: Write> SessionWriter<W> {
    /// Writes the magic and the header record.
    pub fn new(mut w: W, created_by: &str, model_path: &str, now_ns: i64) -> std::io::Result<Self> {
        w.write_all(SESSION_MAGIC)?;
        let mut s = SessionWriter {
            w,
            buf: Vec::with_capacity(1 << 16),
        };
        s.append(&SessionRecord {
            choice: Default::default(),
            received_unix_ns: now_ns,
            endpoint: 0,
            message: Vec::new(),
            header: Some(SessionHeader {
                format_version: SESSION_FORMAT_VERSION,
                created_by: created_by.into(),
                model_path: model_path.into(),
            }),
            learned: None,
        })?;
        Ok(s)
    }
    /// Buffers one record.
    pub fn append(&mut self, rec: &SessionRecord) -> std::io::Result<()> {
        frame_record(rec, &mut self.buf);
        if self.buf.len() > (1 << 20) {
            self.w.write_all(&self.buf)?;
            self.buf.clear();
        }
        Ok(())
    }
    /// Writes buffered records and flushes the writer.
    pub fn flush(&mut self) -> std::io::Result<()> {
        self.w.write_all(&self.buf)?;
        self.buf.clear();
        self.w.flush()
    }
    /// The writer.
    pub fn get_mut(&mut self) -> &mut W {
        &mut self.w
    }
}

/// One step of parsing.
#[derive(Debug, PartialEq)]
pub enum Parsed {
    /// A complete record and the bytes it used.
    Record(SessionRecord, usize),
    /// Not enough bytes yet (normal at the end of a file being written).
    Incomplete,
    /// The bytes here cannot be a record (CRC mismatch or undecodable payload).
    Corrupt(String),
}

/// Parses one record from the front of `bytes`.
pub fn parse_record(bytes: &[u8]) -> Parsed {
    if bytes.len() < 8 {
        return Parsed::Incomplete;
    }
    let len = u32::from_le_bytes([bytes[0], bytes[1], bytes[2], bytes[3]]) as usize;
    let crc = u32::from_le_bytes([bytes[4], bytes[5], bytes[6], bytes[7]]);
    if len > MAX_RECORD {
        return Parsed::Corrupt(format!("record length {len} exceeds {MAX_RECORD}"));
    }
    if bytes.len() < 8 + len {
        return Parsed::Incomplete;
    }
    let payload = &bytes[8..8 + len];
    if crc32(payload) != crc {
        return Parsed::Corrupt("record checksum mismatch".into());
    }
    match SessionRecord::decode(payload) {
        Ok(r) => Parsed::Record(r, 8 + len),
        Err(e) => Parsed::Corrupt(format!("record payload: {e}")),
    }
}

/// A whole session read from bytes.
#[derive(Debug, Default)]
pub struct SessionContents {
    /// The header, if the first record had one.
    pub header: Option<SessionHeader>,
    /// Every complete message record, in order (header excluded).
    pub records: Vec<SessionRecord>,
    /// Bytes at the end that did not form a complete record (a torn tail after a crash).
    pub torn_tail_bytes: usize,
    /// Why reading stopped early, if it did.
    pub tail_problem: Option<String>,
}

/// Why bytes are not a session file.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum SessionError {
    /// Missing magic.
    #[error("not an Auspex session recording (missing the APXSESS1 prefix)")]
    NotASession,
    /// Unknown version.
    #[error("session format version {0} is not supported by this build")]
    Version(u32),
}

/// Reads every complete record; stops at the first incomplete or corrupt one.
pub fn read_session(bytes: &[u8]) -> Result<SessionContents, SessionError> {
    let mut rest = bytes
        .strip_prefix(SESSION_MAGIC.as_slice())
        .ok_or(SessionError::NotASession)?;
    let mut out = SessionContents::default();
    let mut first = true;
    loop {
        if rest.is_empty() {
            break;
        }
        match parse_record(rest) {
            Parsed::Record(r, used) => {
                rest = &rest[used..];
                if first {
                    first = false;
                    if let Some(h) = r.header {
                        if h.format_version != SESSION_FORMAT_VERSION {
                            return Err(SessionError::Version(h.format_version));
                        }
                        out.header = Some(h);
                        continue;
                    }
                }
                out.records.push(r);
            }
            Parsed::Incomplete => {
                out.torn_tail_bytes = rest.len();
                out.tail_problem =
                    Some(format!("{} bytes of an incomplete last record", rest.len()));
                break;
            }
            Parsed::Corrupt(why) => {
                out.torn_tail_bytes = rest.len();
                out.tail_problem = Some(why);
                break;
            }
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn rec(i: u8) -> SessionRecord {
        SessionRecord {
            choice: Default::default(),
            received_unix_ns: i as i64,
            endpoint: 0,
            message: vec![i; i as usize],
            header: None,
            learned: None,
        }
    }

    #[test]
    fn torn_tail_keeps_complete_records() {
        let mut w = SessionWriter::new(Vec::new(), "test", "m", 0).unwrap();
        for i in 0..10 {
            w.append(&rec(i)).unwrap();
        }
        w.flush().unwrap();
        let full = w.get_mut().clone();
        let all = read_session(&full).unwrap();
        assert_eq!(all.records.len(), 10);
        assert_eq!(all.torn_tail_bytes, 0);
        // Cut anywhere inside the last record: nine survive.
        for cut in 1..(8 + 9) {
            let r = read_session(&full[..full.len() - cut]).unwrap();
            assert_eq!(r.records.len(), 9, "cut {cut}");
            assert!(r.torn_tail_bytes > 0);
        }
        // Flip a byte in the last payload: CRC catches it.
        let mut bad = full.clone();
        let n = bad.len();
        bad[n - 1] ^= 0xFF;
        let r = read_session(&bad).unwrap();
        assert_eq!(r.records.len(), 9);
        assert!(r.tail_problem.unwrap().contains("checksum"));
    }

    proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
            let mut b = SESSION_MAGIC.to_vec();
            b.extend(bytes);
            let _ = read_session(&b);
        }
    }
}
