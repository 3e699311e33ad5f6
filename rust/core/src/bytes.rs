//! The byte layout every treewise file shares: a header (magic, version, kind, length, CRC-32)
//! and little-endian fields, read with a bounds check before every allocation.

use crate::error::{Error, Result};

/// The first eight bytes of every treewise file.
pub const MAGIC: &[u8; 8] = b"TREEWISE";
/// The layout version this build writes and reads.
pub const FORMAT_VERSION: u32 = 2;
/// The file holds a fitted model.
pub const KIND_MODEL: u32 = 1;
/// The file holds pair statistics with the codebook they were counted with.
pub const KIND_STATS: u32 = 2;
/// The file holds the tallies of a codebook pass (to merge across workers).
pub const KIND_TALLIES: u32 = 3;
/// The file holds a codebook alone.
pub const KIND_CODEBOOK: u32 = 4;
pub const HEADER_LEN: usize = 8 + 4 + 4 + 8 + 4;

/// Appends little-endian fields to a byte buffer.
#[derive(Default)]
pub struct Writer {
    pub(crate) buf: Vec<u8>,
}

impl Writer {
    pub fn u8(&mut self, v: u8) {
        self.buf.push(v);
    }
    pub fn u32(&mut self, v: u32) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn u64(&mut self, v: u64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn i64(&mut self, v: i64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn f64(&mut self, v: f64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn len(&mut self, n: usize) {
        self.u64(n as u64);
    }
    pub fn str(&mut self, s: &str) {
        self.len(s.len());
        self.buf.extend_from_slice(s.as_bytes());
    }
    pub fn u64s(&mut self, v: &[u64]) {
        self.len(v.len());
        v.iter().for_each(|x| self.u64(*x));
    }
    pub fn f64s(&mut self, v: &[f64]) {
        self.len(v.len());
        v.iter().for_each(|x| self.f64(*x));
    }

    /// The finished file: header (magic, version, kind, payload length, CRC-32) and payload.
    pub fn finish(self, kind: u32) -> Vec<u8> {
        let mut out = Vec::with_capacity(HEADER_LEN + self.buf.len());
        out.extend_from_slice(MAGIC);
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&kind.to_le_bytes());
        out.extend_from_slice(&(self.buf.len() as u64).to_le_bytes());
        out.extend_from_slice(&crc32fast::hash(&self.buf).to_le_bytes());
        out.extend_from_slice(&self.buf);
        out
    }
}

/// Reads little-endian fields, refusing any length that the remaining bytes cannot hold.
pub struct Reader<'a> {
    buf: &'a [u8],
    pos: usize,
}

pub(crate) fn bad(what: impl std::fmt::Display) -> Error {
    Error::CorruptModel(format!(
        "{what}; the file is damaged or was not written by treewise"
    ))
}

impl<'a> Reader<'a> {
    /// Checks the header of `file` and returns a reader over its payload.
    pub fn open(file: &'a [u8], kind: u32) -> Result<Self> {
        if file.len() < HEADER_LEN || &file[..8] != MAGIC {
            return Err(bad("this is not a treewise file (no TREEWISE header)"));
        }
        let word =
            |at: usize| u32::from_le_bytes([file[at], file[at + 1], file[at + 2], file[at + 3]]);
        let version = word(8);
        if version != FORMAT_VERSION {
            return Err(Error::CorruptModel(format!(
                "the file has layout version {version}, but this treewise reads version \
                 {FORMAT_VERSION}; use the treewise release that wrote it"
            )));
        }
        let found = word(12);
        if found != kind {
            return Err(bad(format!("the file holds kind {found}, not kind {kind}")));
        }
        let mut len_bytes = [0u8; 8];
        len_bytes.copy_from_slice(&file[16..24]);
        let declared = u64::from_le_bytes(len_bytes);
        let payload = &file[HEADER_LEN..];
        if declared != payload.len() as u64 {
            return Err(bad(format!(
                "the header declares {declared} bytes of payload but {} follow (truncated?)",
                payload.len()
            )));
        }
        if crc32fast::hash(payload) != word(24) {
            return Err(bad("the checksum does not match the contents"));
        }
        Ok(Reader {
            buf: payload,
            pos: 0,
        })
    }

    fn take(&mut self, n: usize) -> Result<&'a [u8]> {
        if n > self.buf.len() - self.pos {
            return Err(bad(format!(
                "a field at byte {} runs past the end",
                self.pos
            )));
        }
        let out = &self.buf[self.pos..self.pos + n];
        self.pos += n;
        Ok(out)
    }
    fn array<const N: usize>(&mut self) -> Result<[u8; N]> {
        let mut a = [0u8; N];
        a.copy_from_slice(self.take(N)?);
        Ok(a)
    }
    pub fn u8(&mut self) -> Result<u8> {
        Ok(self.take(1)?[0])
    }
    pub fn u32(&mut self) -> Result<u32> {
        Ok(u32::from_le_bytes(self.array()?))
    }
    pub fn u64(&mut self) -> Result<u64> {
        Ok(u64::from_le_bytes(self.array()?))
    }
    pub fn i64(&mut self) -> Result<i64> {
        Ok(i64::from_le_bytes(self.array()?))
    }
    pub fn f64(&mut self) -> Result<f64> {
        Ok(f64::from_le_bytes(self.array()?))
    }
    /// A count of items of `size` bytes each, checked against what is left before any allocation.
    pub fn len(&mut self, size: usize) -> Result<usize> {
        let n = self.u64()?;
        let left = (self.buf.len() - self.pos) as u64;
        if n.checked_mul(size.max(1) as u64)
            .is_none_or(|bytes| bytes > left)
        {
            return Err(bad(format!(
                "a length of {n} at byte {} is larger than the file",
                self.pos - 8
            )));
        }
        usize::try_from(n).map_err(|_| bad("a length does not fit in memory"))
    }
    pub fn str(&mut self) -> Result<String> {
        let n = self.len(1)?;
        let bytes = self.take(n)?;
        String::from_utf8(bytes.to_vec()).map_err(|_| bad("a name is not valid UTF-8"))
    }
    pub fn u64s(&mut self) -> Result<Vec<u64>> {
        let n = self.len(8)?;
        (0..n).map(|_| self.u64()).collect()
    }
    pub fn f64s(&mut self) -> Result<Vec<f64>> {
        let n = self.len(8)?;
        (0..n).map(|_| self.f64()).collect()
    }
    /// Whether every byte has been read.
    pub fn is_done(&self) -> bool {
        self.pos == self.buf.len()
    }
    /// Fails unless every byte was read.
    pub fn end(&self) -> Result<()> {
        if self.pos != self.buf.len() {
            return Err(bad(format!(
                "{} unread bytes at the end",
                self.buf.len() - self.pos
            )));
        }
        Ok(())
    }
}
