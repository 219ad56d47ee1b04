//! The framing spoken between tarn and an external energy model: a long-running
//! program that reads batched requests on its standard input and writes replies on its
//! standard output, so that explorers, quench, training and latent Monte Carlo can call
//! it millions of times without starting a process per call.
//!
//! This module only encodes and decodes; it is generic over [`std::io::Read`] and
//! [`std::io::Write`] and never starts a process (tarn's process code does that and
//! hands the child's pipes to [`ExternalClient`]).
//!
//! # Framing, version 1
//!
//! All integers are unsigned little-endian, all reals IEEE-754 float64 little-endian.
//! Configurations are row-major `[n, dim]`; forces are minus the gradient of the energy.
//!
//! Request (tarn → program), 25 bytes of header then the payload:
//!
//! | bytes | type | field |
//! | --- | --- | --- |
//! | 4 | ASCII | magic `TRNQ` |
//! | 4 | u32 | version, 1 |
//! | 8 | u64 | n, number of configurations (≥ 1) |
//! | 8 | u64 | dim, coordinates per configuration |
//! | 1 | u8 | want_forces: 0 energies only, 1 energies and forces |
//! | 8·n·dim | f64 | the configurations |
//!
//! Reply (program → tarn), 16 bytes of header then the payload:
//!
//! | bytes | type | field |
//! | --- | --- | --- |
//! | 4 | ASCII | magic `TRNR` |
//! | 4 | u32 | status: 0 success, anything else failure |
//! | 8 | u64 | on success n (must equal the request's n); on failure the length L of a message |
//! | 8·n | f64 | on success: the energies |
//! | 8·n·dim | f64 | on success and only if want_forces = 1: the forces |
//! | L | UTF-8 | on failure: a message for the user (at most 1 MiB) |
//!
//! The program answers requests in order, one reply per request, and must write nothing
//! else to standard output (diagnostics go to standard error). When tarn is done it
//! closes the program's standard input; the program should then exit with status 0.
//!
//! tarn refuses, with a message naming what went wrong: a reply that ends early (the
//! program died or closed its output), a wrong magic (typically a stray `print` on
//! standard output), a different n, a non-zero status (its message is passed on), and
//! NaN in energies or forces. Infinite energies are passed on (an explorer rejects a
//! proposal with a non-finite energy, as with overlapping particles of a built-in
//! cluster). After any error the
//! client refuses every later call, because the stream position is lost.

use std::io::{Read, Write};
use std::sync::Mutex;

use crate::energy::{check_batch, EnergyError, EnergyModel};

/// Request magic.
pub const REQUEST_MAGIC: [u8; 4] = *b"TRNQ";
/// Reply magic.
pub const REPLY_MAGIC: [u8; 4] = *b"TRNR";
/// The framing version this module speaks.
pub const FRAMING_VERSION: u32 = 1;
/// Size of a request header in bytes.
pub const REQUEST_HEADER_LEN: usize = 25;
/// Size of a reply header in bytes.
pub const REPLY_HEADER_LEN: usize = 16;
/// Longest failure message accepted from a program.
pub const MAX_MESSAGE_LEN: u64 = 1 << 20;

/// Why a frame could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum FramingError {
    /// The stream ended inside a frame.
    #[error("the energy program closed its output {0} (did it die? see its standard error)")]
    Eof(String),
    /// An I/O error other than end of stream.
    #[error("pipe to the energy program failed while {what}: {source}")]
    Io {
        /// What was being done.
        what: &'static str,
        /// The underlying error.
        #[source]
        source: std::io::Error,
    },
    /// The frame does not start with the magic.
    #[error("{what} does not start with magic {expected:?} but with bytes {got:02x?}; is something else writing to the energy program's standard output (a print statement)?")]
    Magic {
        /// `request` or `reply`.
        what: &'static str,
        /// The magic that should be there.
        expected: String,
        /// The first four bytes that were there.
        got: [u8; 4],
    },
    /// The request speaks another framing version.
    #[error("request has framing version {0}, this side speaks version 1")]
    Version(u32),
    /// The reply's size does not match the request.
    #[error("the energy program answered {got} configurations to a request of {want}")]
    Size {
        /// Configurations requested.
        want: u64,
        /// Configurations answered.
        got: u64,
    },
    /// The program reported a failure.
    #[error("the energy program reported failure (status {status}): {message}")]
    Status {
        /// The non-zero status.
        status: u32,
        /// The program's message.
        message: String,
    },
    /// A reply held NaN.
    #[error("the energy program returned NaN in the {what} of configuration {index}")]
    NaN {
        /// `energy` or `forces`.
        what: &'static str,
        /// The configuration's index in the request.
        index: usize,
    },
    /// A header field is out of range.
    #[error("malformed frame: {0}")]
    Malformed(String),
}

impl From<FramingError> for EnergyError {
    fn from(e: FramingError) -> Self {
        EnergyError::External(e.to_string())
    }
}

/// A decoded request, as a program written in Rust would see it.
#[derive(Debug, Clone, PartialEq)]
pub struct Request {
    /// Number of configurations.
    pub n: usize,
    /// Coordinates per configuration.
    pub dim: usize,
    /// Whether forces are wanted.
    pub want_forces: bool,
    /// The configurations, `[n, dim]`.
    pub x: Vec<f64>,
}

/// Reads exactly `buf.len()` bytes, reporting a clean end of stream before the first
/// byte as `Ok(false)` when `eof_ok`.
fn read_full<R: Read>(
    r: &mut R,
    buf: &mut [u8],
    what: &'static str,
    eof_ok: bool,
) -> Result<bool, FramingError> {
    let mut done = 0;
    while done < buf.len() {
        match r.read(&mut buf[done..]) {
            Ok(0) => {
                if done == 0 && eof_ok {
                    return Ok(false);
                }
                return Err(FramingError::Eof(format!(
                    "after {done} of {} bytes of the {what}",
                    buf.len()
                )));
            }
            Ok(k) => done += k,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(source) => return Err(FramingError::Io { what, source }),
        }
    }
    Ok(true)
}

/// Appends `v` as little-endian f64 to `out`.
fn put_f64s(out: &mut Vec<u8>, v: &[f64]) {
    out.reserve(v.len() * 8);
    for x in v {
        out.extend_from_slice(&x.to_le_bytes());
    }
}

/// Decodes little-endian f64 from `bytes` into `out` (same count).
fn get_f64s(bytes: &[u8], out: &mut [f64]) {
    for (o, b) in out.iter_mut().zip(bytes.chunks_exact(8)) {
        *o = f64::from_le_bytes(b.try_into().expect("chunks of 8"));
    }
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().expect("4 bytes"))
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

/// Encodes a request for the `n = x.len() / dim` configurations of `x` into `out`
/// (cleared first).
pub fn encode_request(x: &[f64], dim: usize, want_forces: bool, out: &mut Vec<u8>) {
    out.clear();
    out.extend_from_slice(&REQUEST_MAGIC);
    out.extend_from_slice(&FRAMING_VERSION.to_le_bytes());
    out.extend_from_slice(&((x.len() / dim.max(1)) as u64).to_le_bytes());
    out.extend_from_slice(&(dim as u64).to_le_bytes());
    out.push(u8::from(want_forces));
    put_f64s(out, x);
}

/// Reads one request; `Ok(None)` on a clean end of stream between requests (the client
/// is done). `max_values` bounds n·dim so that garbage cannot ask for a huge buffer.
pub fn read_request<R: Read>(
    r: &mut R,
    max_values: usize,
) -> Result<Option<Request>, FramingError> {
    let mut h = [0u8; REQUEST_HEADER_LEN];
    if !read_full(r, &mut h, "request header", true)? {
        return Ok(None);
    }
    let magic: [u8; 4] = h[0..4].try_into().expect("4 bytes");
    if magic != REQUEST_MAGIC {
        return Err(FramingError::Magic {
            what: "request",
            expected: "TRNQ".into(),
            got: magic,
        });
    }
    let version = u32_at(&h, 4);
    if version != FRAMING_VERSION {
        return Err(FramingError::Version(version));
    }
    let n = u64_at(&h, 8);
    let dim = u64_at(&h, 16);
    let want_forces = match h[24] {
        0 => false,
        1 => true,
        b => {
            return Err(FramingError::Malformed(format!(
                "want_forces is {b}, not 0 or 1"
            )))
        }
    };
    let values = n
        .checked_mul(dim)
        .filter(|v| *v as u128 <= max_values as u128);
    let values = values.ok_or_else(|| {
        FramingError::Malformed(format!("n = {n}, dim = {dim} exceeds {max_values} values"))
    })?;
    let mut payload = vec![0u8; values as usize * 8];
    read_full(r, &mut payload, "request payload", false)?;
    let mut x = vec![0.0; values as usize];
    get_f64s(&payload, &mut x);
    Ok(Some(Request {
        n: n as usize,
        dim: dim as usize,
        want_forces,
        x,
    }))
}

/// Writes a success reply with `energies` and, if the request wanted them, `forces`.
pub fn write_reply<W: Write>(
    w: &mut W,
    energies: &[f64],
    forces: Option<&[f64]>,
) -> Result<(), FramingError> {
    let mut out =
        Vec::with_capacity(REPLY_HEADER_LEN + 8 * (energies.len() + forces.map_or(0, |f| f.len())));
    out.extend_from_slice(&REPLY_MAGIC);
    out.extend_from_slice(&0u32.to_le_bytes());
    out.extend_from_slice(&(energies.len() as u64).to_le_bytes());
    put_f64s(&mut out, energies);
    if let Some(f) = forces {
        put_f64s(&mut out, f);
    }
    w.write_all(&out)
        .and_then(|_| w.flush())
        .map_err(|source| FramingError::Io {
            what: "writing a reply",
            source,
        })
}

/// Writes a failure reply with a non-zero `status` and a message for the user.
pub fn write_error_reply<W: Write>(
    w: &mut W,
    status: u32,
    message: &str,
) -> Result<(), FramingError> {
    let status = status.max(1);
    let mut out = Vec::with_capacity(REPLY_HEADER_LEN + message.len());
    out.extend_from_slice(&REPLY_MAGIC);
    out.extend_from_slice(&status.to_le_bytes());
    out.extend_from_slice(&(message.len() as u64).to_le_bytes());
    out.extend_from_slice(message.as_bytes());
    w.write_all(&out)
        .and_then(|_| w.flush())
        .map_err(|source| FramingError::Io {
            what: "writing a reply",
            source,
        })
}

/// Reads the reply to a request of `n` configurations of `dim` coordinates into
/// `energy[..n]` and, when given, `forces[..n * dim]` (which must match the request's
/// want_forces). `scratch` is reused between calls to avoid allocation.
pub fn read_reply<R: Read>(
    r: &mut R,
    n: usize,
    dim: usize,
    energy: &mut [f64],
    forces: Option<&mut [f64]>,
    scratch: &mut Vec<u8>,
) -> Result<(), FramingError> {
    let mut h = [0u8; REPLY_HEADER_LEN];
    read_full(r, &mut h, "reply header", false)?;
    let magic: [u8; 4] = h[0..4].try_into().expect("4 bytes");
    if magic != REPLY_MAGIC {
        return Err(FramingError::Magic {
            what: "reply",
            expected: "TRNR".into(),
            got: magic,
        });
    }
    let status = u32_at(&h, 4);
    let count = u64_at(&h, 8);
    if status != 0 {
        if count > MAX_MESSAGE_LEN {
            return Err(FramingError::Malformed(format!(
                "failure message of {count} bytes (status {status})"
            )));
        }
        let mut msg = vec![0u8; count as usize];
        read_full(r, &mut msg, "failure message", false)?;
        return Err(FramingError::Status {
            status,
            message: String::from_utf8_lossy(&msg).into_owned(),
        });
    }
    if count != n as u64 {
        return Err(FramingError::Size {
            want: n as u64,
            got: count,
        });
    }
    scratch.resize(8 * n, 0);
    read_full(r, scratch, "energies", false)?;
    get_f64s(scratch, &mut energy[..n]);
    if let Some(i) = energy[..n].iter().position(|e| e.is_nan()) {
        return Err(FramingError::NaN {
            what: "energy",
            index: i,
        });
    }
    if let Some(f) = forces {
        scratch.resize(8 * n * dim, 0);
        read_full(r, scratch, "forces", false)?;
        get_f64s(scratch, &mut f[..n * dim]);
        if let Some(i) = f[..n * dim].iter().position(|v| v.is_nan()) {
            return Err(FramingError::NaN {
                what: "forces",
                index: i / dim.max(1),
            });
        }
    }
    Ok(())
}

/// The pipes and buffers of one external program, behind the client's mutex.
struct Pipe<R, W> {
    reader: R,
    writer: W,
    request: Vec<u8>,
    scratch: Vec<u8>,
    broken: Option<String>,
}

/// An [`EnergyModel`] answered by an external program over a reader (its standard
/// output) and a writer (its standard input). Calls are serialised by an interior
/// mutex, so the client can be shared like any model; batches larger than
/// `max_batch` are split into several requests.
pub struct ExternalClient<R, W> {
    dim: usize,
    particle_dims: Option<usize>,
    max_batch: usize,
    pipe: Mutex<Pipe<R, W>>,
}

impl<R: Read + Send, W: Write + Send> ExternalClient<R, W> {
    /// A client for a program whose configurations have `dim` coordinates.
    pub fn new(reader: R, writer: W, dim: usize) -> Self {
        ExternalClient {
            dim,
            particle_dims: None,
            max_batch: 1 << 16,
            pipe: Mutex::new(Pipe {
                reader,
                writer,
                request: Vec::new(),
                scratch: Vec::new(),
                broken: None,
            }),
        }
    }

    /// Declares the configurations as particles in `dims` dimensions with translation
    /// as a zero mode (see [`EnergyModel::particle_dims`]).
    pub fn with_particle_dims(mut self, dims: Option<usize>) -> Self {
        self.particle_dims = dims;
        self
    }

    /// Sets the largest number of configurations sent in one request (at least 1).
    pub fn with_max_batch(mut self, max_batch: usize) -> Self {
        self.max_batch = max_batch.max(1);
        self
    }

    /// Gives back the reader and writer (e.g. to close the program's input and wait
    /// for it).
    pub fn into_inner(self) -> (R, W) {
        let pipe = self.pipe.into_inner().unwrap_or_else(|p| p.into_inner());
        (pipe.reader, pipe.writer)
    }

    /// One request and its reply.
    fn round_trip(
        pipe: &mut Pipe<R, W>,
        x: &[f64],
        dim: usize,
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), FramingError> {
        let n = x.len() / dim;
        encode_request(x, dim, forces.is_some(), &mut pipe.request);
        pipe.writer
            .write_all(&pipe.request)
            .and_then(|_| pipe.writer.flush())
            .map_err(|source| match source.kind() {
                std::io::ErrorKind::BrokenPipe => {
                    FramingError::Eof("its input (broken pipe while sending a request)".into())
                }
                _ => FramingError::Io {
                    what: "sending a request",
                    source,
                },
            })?;
        read_reply(&mut pipe.reader, n, dim, energy, forces, &mut pipe.scratch)
    }
}

impl<R: Read + Send, W: Write + Send> EnergyModel for ExternalClient<R, W> {
    fn dim(&self) -> usize {
        self.dim
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        mut forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        let n = check_batch(self.dim, x, energy, forces.as_deref())?;
        let mut pipe = self
            .pipe
            .lock()
            .map_err(|_| EnergyError::External("client mutex poisoned".into()))?;
        if let Some(msg) = &pipe.broken {
            return Err(EnergyError::External(format!(
                "unusable after an earlier failure: {msg}"
            )));
        }
        let d = self.dim;
        let mut start = 0;
        while start < n {
            let m = self.max_batch.min(n - start);
            let xs = &x[start * d..(start + m) * d];
            let es = &mut energy[start..start + m];
            let fs = forces
                .as_deref_mut()
                .map(|f| &mut f[start * d..(start + m) * d]);
            if let Err(e) = Self::round_trip(&mut pipe, xs, d, es, fs) {
                let msg = e.to_string();
                pipe.broken = Some(msg.clone());
                return Err(EnergyError::External(msg));
            }
            start += m;
        }
        Ok(())
    }

    fn particle_dims(&self) -> Option<usize> {
        self.particle_dims
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Cursor;

    #[test]
    fn request_and_reply_round_trip_in_memory() {
        let x = [1.0, -2.0, 0.5, 3.25];
        let mut buf = Vec::new();
        encode_request(&x, 2, true, &mut buf);
        assert_eq!(buf.len(), REQUEST_HEADER_LEN + 32);
        let req = read_request(&mut Cursor::new(&buf), 1000).unwrap().unwrap();
        assert_eq!(
            req,
            Request {
                n: 2,
                dim: 2,
                want_forces: true,
                x: x.to_vec()
            }
        );
        let mut out = Vec::new();
        write_reply(&mut out, &[1.5, 2.5], Some(&[0.1, 0.2, 0.3, 0.4])).unwrap();
        let (mut e, mut f, mut s) = ([0.0; 2], [0.0; 4], Vec::new());
        read_reply(&mut Cursor::new(&out), 2, 2, &mut e, Some(&mut f), &mut s).unwrap();
        assert_eq!(e, [1.5, 2.5]);
        assert_eq!(f, [0.1, 0.2, 0.3, 0.4]);
        // Clean end of stream between requests is not an error.
        assert!(read_request(&mut Cursor::new(Vec::<u8>::new()), 10)
            .unwrap()
            .is_none());
    }

    #[test]
    fn malformed_frames_are_refused_with_their_reason() {
        let mut s = Vec::new();
        let mut e = [0.0; 2];
        let err = read_reply(
            &mut Cursor::new(b"hello world, garbage".to_vec()),
            2,
            1,
            &mut e,
            None,
            &mut s,
        )
        .unwrap_err();
        assert!(err.to_string().contains("magic"), "{err}");
        let mut out = Vec::new();
        write_reply(&mut out, &[1.0], None).unwrap();
        let err = read_reply(&mut Cursor::new(&out), 2, 1, &mut e, None, &mut s).unwrap_err();
        assert!(
            matches!(err, FramingError::Size { want: 2, got: 1 }),
            "{err}"
        );
        let err = read_reply(&mut Cursor::new(&out[..10]), 1, 1, &mut e, None, &mut s).unwrap_err();
        assert!(matches!(err, FramingError::Eof(_)), "{err}");
        let mut out = Vec::new();
        write_error_reply(&mut out, 7, "bad dim").unwrap();
        let err = read_reply(&mut Cursor::new(&out), 1, 1, &mut e, None, &mut s).unwrap_err();
        assert!(err.to_string().contains("bad dim") && err.to_string().contains("status 7"));
        let mut out = Vec::new();
        write_reply(&mut out, &[f64::NAN], None).unwrap();
        let err = read_reply(&mut Cursor::new(&out), 1, 1, &mut e, None, &mut s).unwrap_err();
        assert!(matches!(err, FramingError::NaN { .. }));
        let mut buf = Vec::new();
        encode_request(&[1.0; 4], 2, false, &mut buf);
        let err = read_request(&mut Cursor::new(&buf), 3).unwrap_err();
        assert!(err.to_string().contains("exceeds"));
    }
}
