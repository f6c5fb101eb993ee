//! Packet-log files: every frame exactly as it came off the wire, with the gateway's receive
//! time, so a capture can be replayed through the same decoder later.
//!
//! Layout (little-endian; `docs/wire-format.md` has the table):
//! `magic "CSGLOG\r\n" version(u16) reserved(u16) created_us(i64) note_len(u32) note crc(u32)`,
//! then records `received_us(i64) frame`. A record has no length or checksum of its own: the
//! frame's length and CRC delimit and protect it.
//!
//! The reader returns every complete frame; a cut tail is reported in [`LogReadStats::truncated`]
//! and garbage between records is skipped by scanning for the frame magic and a matching CRC,
//! and counted in [`LogReadStats::garbage_regions`]. Neither is silent: both are logged.

use super::codec::RawFrame;
use super::wire::{self, WireError};
use bytes::{Buf, BytesMut};
use std::fs::{File, OpenOptions};
use std::io::{self, BufReader, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

/// First eight bytes of a packet log. The CR LF pair exposes files mangled by text-mode
/// transfers, as in PNG's signature.
pub const LOG_MAGIC: [u8; 8] = *b"CSGLOG\r\n";
/// The log format version this code reads and writes.
pub const LOG_VERSION: u16 = 1;
/// Longest free-text note in a file header.
pub const MAX_NOTE_LEN: usize = 64 * 1024;
/// Bytes before every frame in a record (the receive timestamp).
pub const RECORD_PREFIX_LEN: usize = 8;

/// Errors of packet-log files.
#[derive(Debug, thiserror::Error)]
pub enum LogError {
    /// Reading or writing failed.
    #[error("packet log {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: io::Error,
    },
    /// The file header is missing or damaged.
    #[error("packet log {path}: bad file header: {reason}")]
    BadHeader {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// A frame handed to the writer is not one whole, CRC-clean frame.
    #[error("refusing to log a malformed frame: {0}")]
    BadFrame(#[from] WireError),
}

/// The file header.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LogHeader {
    /// Format version.
    pub version: u16,
    /// When the file was created, microseconds since the Unix epoch.
    pub created_us: i64,
    /// Free text (what was recorded, where).
    pub note: String,
}

impl LogHeader {
    pub(crate) fn encode(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(28 + self.note.len());
        out.extend_from_slice(&LOG_MAGIC);
        out.extend_from_slice(&self.version.to_le_bytes());
        out.extend_from_slice(&0u16.to_le_bytes());
        out.extend_from_slice(&self.created_us.to_le_bytes());
        out.extend_from_slice(&(self.note.len() as u32).to_le_bytes());
        out.extend_from_slice(self.note.as_bytes());
        let crc = crc32fast::hash(&out);
        out.extend_from_slice(&crc.to_le_bytes());
        out
    }

    fn read(src: &mut impl Read, path: &Path) -> Result<(LogHeader, u64), LogError> {
        let bad = |reason: String| LogError::BadHeader {
            path: path.to_owned(),
            reason,
        };
        let io_err = |source| LogError::Io {
            path: path.to_owned(),
            source,
        };
        let mut fixed = [0u8; 24];
        src.read_exact(&mut fixed).map_err(|e| match e.kind() {
            io::ErrorKind::UnexpectedEof => bad("file shorter than a header".into()),
            _ => io_err(e),
        })?;
        if fixed[..8] != LOG_MAGIC {
            return Err(bad(format!("magic {:02x?}", &fixed[..8])));
        }
        let version = u16::from_le_bytes([fixed[8], fixed[9]]);
        if version != LOG_VERSION {
            return Err(bad(format!("unsupported version {version}")));
        }
        let note_len = u32::from_le_bytes(fixed[20..24].try_into().expect("4")) as usize;
        if note_len > MAX_NOTE_LEN {
            return Err(bad(format!("note of {note_len} bytes")));
        }
        let mut rest = vec![0u8; note_len + 4];
        src.read_exact(&mut rest)
            .map_err(|_| bad("header cut inside the note".into()))?;
        let mut covered = fixed.to_vec();
        covered.extend_from_slice(&rest[..note_len]);
        let stored = u32::from_le_bytes(rest[note_len..].try_into().expect("4"));
        if crc32fast::hash(&covered) != stored {
            return Err(bad("header crc mismatch".into()));
        }
        let note = String::from_utf8(rest[..note_len].to_vec())
            .map_err(|_| bad("note is not utf-8".into()))?;
        Ok((
            LogHeader {
                version,
                created_us: i64::from_le_bytes(fixed[12..20].try_into().expect("8")),
                note,
            },
            (24 + note_len + 4) as u64,
        ))
    }
}

/// Appends records to a packet log.
#[derive(Debug)]
pub struct LogWriter {
    file: File,
    path: PathBuf,
    record: Vec<u8>,
}

impl LogWriter {
    /// Opens `path` for appending, writing a header (with `note` and `created_us`) if the file
    /// is new or empty, else checking the header already there.
    pub fn open_append(path: &Path, created_us: i64, note: &str) -> Result<LogWriter, LogError> {
        let io_err = |source| LogError::Io {
            path: path.to_owned(),
            source,
        };
        let mut file = OpenOptions::new()
            .read(true)
            .append(true)
            .create(true)
            .open(path)
            .map_err(io_err)?;
        let len = file.metadata().map_err(io_err)?.len();
        if len == 0 {
            let mut note = note.to_owned();
            if note.len() > MAX_NOTE_LEN {
                let mut cut = MAX_NOTE_LEN;
                while !note.is_char_boundary(cut) {
                    cut -= 1;
                }
                note.truncate(cut);
            }
            let header = LogHeader {
                version: LOG_VERSION,
                created_us,
                note,
            };
            file.write_all(&header.encode()).map_err(io_err)?;
        } else {
            file.seek(SeekFrom::Start(0)).map_err(io_err)?;
            LogHeader::read(&mut file, path)?;
        }
        Ok(LogWriter {
            file,
            path: path.to_owned(),
            record: Vec::new(),
        })
    }

    /// Appends one record with a single write, so a crash leaves at worst one cut record at
    /// the end, which the reader reports. `frame` must be one whole frame.
    pub fn append(&mut self, received_us: i64, frame: &[u8]) -> Result<(), LogError> {
        match wire::check(frame, wire::MAX_FRAME_LEN)? {
            Some(len) if len == frame.len() => {}
            _ => {
                return Err(LogError::BadFrame(WireError::Truncated {
                    needed: frame.len(),
                    have: frame.len(),
                }))
            }
        }
        self.record.clear();
        self.record.extend_from_slice(&received_us.to_le_bytes());
        self.record.extend_from_slice(frame);
        self.file
            .write_all(&self.record)
            .map_err(|source| LogError::Io {
                path: self.path.clone(),
                source,
            })
    }

    /// Forces written records to stable storage (fsync).
    pub fn sync(&mut self) -> Result<(), LogError> {
        self.file.sync_data().map_err(|source| LogError::Io {
            path: self.path.clone(),
            source,
        })
    }
}

/// One record read back.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LogRecord {
    /// File offset of the record.
    pub offset: u64,
    /// Gateway receive time, microseconds since the Unix epoch.
    pub received_us: i64,
    /// The frame as it was on the wire.
    pub frame: RawFrame,
}

/// A tail cut inside a record.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Truncation {
    /// File offset where the cut record starts.
    pub offset: u64,
    /// Bytes of it present.
    pub len: u64,
}

/// What the reader met besides records.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LogReadStats {
    /// Records returned.
    pub records: u64,
    /// Separate runs of bytes skipped to resynchronise.
    pub garbage_regions: u64,
    /// Bytes skipped in total.
    pub garbage_bytes: u64,
    /// A record cut by the end of the file, if any.
    pub truncated: Option<Truncation>,
}

/// Reads records, resynchronising past garbage.
#[derive(Debug)]
pub struct LogReader<R> {
    src: R,
    path: PathBuf,
    header: LogHeader,
    buf: BytesMut,
    /// File offset of `buf[0]`.
    offset: u64,
    eof: bool,
    max_frame_len: usize,
    stats: LogReadStats,
    /// File offset just past the last garbage byte skipped, to merge adjacent skips.
    garbage_end: Option<u64>,
}

impl LogReader<BufReader<File>> {
    /// Opens a file and reads its header.
    pub fn open(path: &Path) -> Result<Self, LogError> {
        let file = File::open(path).map_err(|source| LogError::Io {
            path: path.to_owned(),
            source,
        })?;
        LogReader::new(BufReader::new(file), path, wire::MAX_FRAME_LEN)
    }
}

impl<R: Read> LogReader<R> {
    /// Reads the header from `src`; `path` is only for messages.
    pub fn new(mut src: R, path: &Path, max_frame_len: usize) -> Result<Self, LogError> {
        let (header, offset) = LogHeader::read(&mut src, path)?;
        Ok(LogReader {
            src,
            path: path.to_owned(),
            header,
            buf: BytesMut::with_capacity(64 * 1024),
            offset,
            eof: false,
            max_frame_len: max_frame_len.min(wire::MAX_FRAME_LEN),
            stats: LogReadStats::default(),
            garbage_end: None,
        })
    }

    /// The file header.
    pub fn header(&self) -> &LogHeader {
        &self.header
    }

    /// Counts so far (complete once [`LogReader::next_record`] has returned `Ok(None)`).
    pub fn stats(&self) -> &LogReadStats {
        &self.stats
    }

    fn fill(&mut self) -> Result<(), LogError> {
        let mut chunk = [0u8; 64 * 1024];
        match self.src.read(&mut chunk) {
            Ok(0) => self.eof = true,
            Ok(k) => self.buf.extend_from_slice(&chunk[..k]),
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(source) => {
                return Err(LogError::Io {
                    path: self.path.clone(),
                    source,
                })
            }
        }
        Ok(())
    }

    fn skip(&mut self, k: usize) {
        let at = self.offset;
        match self.garbage_end {
            Some(end) if end == at => {}
            _ => {
                self.stats.garbage_regions += 1;
                tracing::warn!(path = %self.path.display(), offset = at, "packet log: garbage, resynchronising");
            }
        }
        self.stats.garbage_bytes += k as u64;
        self.buf.advance(k);
        self.offset += k as u64;
        self.garbage_end = Some(self.offset);
    }

    /// Bytes to skip so that the next frame magic after the current one follows a
    /// timestamp-sized prefix, if the buffer holds one.
    fn next_magic(&self) -> Option<usize> {
        self.buf
            .get(RECORD_PREFIX_LEN + 1..)?
            .windows(wire::MAGIC.len())
            .position(|w| w == wire::MAGIC)
            .map(|p| p + 1)
    }

    /// The next complete record, `Ok(None)` at the end of the file.
    pub fn next_record(&mut self) -> Result<Option<LogRecord>, LogError> {
        loop {
            if self.buf.len() < RECORD_PREFIX_LEN + 8 && !self.eof {
                self.fill()?;
                continue;
            }
            if self.buf.is_empty() {
                return Ok(None);
            }
            let outcome = if self.buf.len() <= RECORD_PREFIX_LEN {
                Ok(None)
            } else {
                wire::check(&self.buf[RECORD_PREFIX_LEN..], self.max_frame_len)
            };
            match outcome {
                Ok(Some(len)) => {
                    let offset = self.offset;
                    let received_us =
                        i64::from_le_bytes(self.buf[..8].try_into().expect("8 bytes"));
                    self.buf.advance(RECORD_PREFIX_LEN);
                    let frame = self.buf.split_to(len).freeze();
                    self.offset += (RECORD_PREFIX_LEN + len) as u64;
                    self.stats.records += 1;
                    return Ok(Some(LogRecord {
                        offset,
                        received_us,
                        frame: RawFrame::new(frame, self.max_frame_len)
                            .expect("checked just above"),
                    }));
                }
                Ok(None) if !self.eof => self.fill()?,
                Ok(None) if self.next_magic().is_some() => {
                    // The file ends before the length this record declares, yet another frame
                    // magic follows: the length field is damaged, not the tail cut. Resync, or
                    // every intact record after it would be dropped as one "cut" record.
                    let k = self.next_magic().expect("just checked");
                    self.skip(k);
                }
                Ok(None) => {
                    let cut = Truncation {
                        offset: self.offset,
                        len: self.buf.len() as u64,
                    };
                    tracing::warn!(path = %self.path.display(), offset = cut.offset, bytes = cut.len, "packet log: last record cut");
                    self.stats.truncated = Some(cut);
                    self.offset += self.buf.len() as u64;
                    self.buf.clear();
                    return Ok(None);
                }
                Err(_) => {
                    // Resync: the next place a frame magic follows a timestamp-sized prefix.
                    match self.next_magic() {
                        Some(k) => self.skip(k),
                        None if self.eof => {
                            let k = self.buf.len();
                            self.skip(k);
                        }
                        None => {
                            // Keep a tail that could hold the start of a magic.
                            let keep = RECORD_PREFIX_LEN + wire::MAGIC.len() - 1;
                            let k = self.buf.len().saturating_sub(keep).max(1);
                            self.skip(k);
                        }
                    }
                }
            }
        }
    }
}

impl<R: Read> Iterator for LogReader<R> {
    type Item = Result<LogRecord, LogError>;

    fn next(&mut self) -> Option<Self::Item> {
        self.next_record().transpose()
    }
}
