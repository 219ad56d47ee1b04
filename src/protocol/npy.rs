//! A strict reader and writer for NumPy `.npy` files (format versions 1.0, 2.0, 3.0).
//!
//! Owns: the bytes of `.npy` arrays exchanged with workers and exported to users.
//! Must not touch: the store, task directories (callers pass bytes or paths).
//!
//! Only what tarn exchanges is accepted: little-endian `<f8`, `<f4`, `<i8`, `<i4` and
//! `|u1`/`|b1` element types, C or Fortran order, any rank up to 4. Everything is read
//! into `f64`, which holds every 32-bit integer exactly and every integer label tarn
//! uses. Header and body sizes are checked before anything is allocated, so a hostile
//! file cannot make the reader allocate more than the file's own length.

use std::io::Write;
use std::path::Path;

/// The NumPy magic string that opens every `.npy` file.
const MAGIC: &[u8] = b"\x93NUMPY";
/// The largest header tarn accepts; NumPy's own headers are a few hundred bytes.
const MAX_HEADER: usize = 64 * 1024;

/// Why an `.npy` file could not be read.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum NpyError {
    #[error("not a .npy file (missing the \\x93NUMPY magic)")]
    Magic,
    #[error("unsupported .npy format version {0}.{1}")]
    Version(u8, u8),
    #[error("the file ends inside the {0}")]
    Truncated(&'static str),
    #[error("malformed .npy header: {0}")]
    Header(String),
    #[error("unsupported element type '{0}' (tarn reads <f8, <f4, <i8, <i4, |u1, |b1)")]
    Dtype(String),
    #[error("the body holds {got} bytes but the header's shape {shape:?} needs {want}")]
    BodySize {
        shape: Vec<usize>,
        want: usize,
        got: usize,
    },
}

/// A dense array of numbers with its shape, in C (row-major) order.
#[derive(Debug, Clone, PartialEq)]
pub struct Array {
    /// Extent of each axis; the product is `data.len()`.
    pub shape: Vec<usize>,
    /// Elements in row-major order.
    pub data: Vec<f64>,
}

impl Array {
    /// A one-dimensional array.
    pub fn vector(data: Vec<f64>) -> Self {
        Array {
            shape: vec![data.len()],
            data,
        }
    }

    /// A two-dimensional array of `rows` rows; `data.len()` must be a multiple of rows.
    pub fn matrix(rows: usize, cols: usize, data: Vec<f64>) -> Self {
        debug_assert_eq!(rows * cols, data.len());
        Array {
            shape: vec![rows, cols],
            data,
        }
    }

    /// Number of rows (the first axis), 0 for a scalar-shaped array.
    pub fn rows(&self) -> usize {
        self.shape.first().copied().unwrap_or(0)
    }
}

/// The element types tarn understands.
#[derive(Debug, Clone, Copy)]
enum Dtype {
    F8,
    F4,
    I8,
    I4,
    U1,
}

impl Dtype {
    fn parse(descr: &str) -> Result<Self, NpyError> {
        match descr {
            "<f8" => Ok(Dtype::F8),
            "<f4" => Ok(Dtype::F4),
            "<i8" => Ok(Dtype::I8),
            "<i4" => Ok(Dtype::I4),
            "|u1" | "|b1" | "<u1" => Ok(Dtype::U1),
            other => Err(NpyError::Dtype(other.to_string())),
        }
    }

    fn size(self) -> usize {
        match self {
            Dtype::F8 | Dtype::I8 => 8,
            Dtype::F4 | Dtype::I4 => 4,
            Dtype::U1 => 1,
        }
    }

    fn decode(self, b: &[u8]) -> f64 {
        match self {
            Dtype::F8 => f64::from_le_bytes(b.try_into().expect("8 bytes")),
            Dtype::F4 => f32::from_le_bytes(b.try_into().expect("4 bytes")) as f64,
            Dtype::I8 => i64::from_le_bytes(b.try_into().expect("8 bytes")) as f64,
            Dtype::I4 => i32::from_le_bytes(b.try_into().expect("4 bytes")) as f64,
            Dtype::U1 => b[0] as f64,
        }
    }
}

/// Parses a whole `.npy` file held in memory.
pub fn decode(bytes: &[u8]) -> Result<Array, NpyError> {
    if bytes.len() < MAGIC.len() + 2 || &bytes[..MAGIC.len()] != MAGIC {
        return Err(NpyError::Magic);
    }
    let (major, minor) = (bytes[6], bytes[7]);
    let (header_len, header_start) = match major {
        1 => {
            let b = bytes
                .get(8..10)
                .ok_or(NpyError::Truncated("header length"))?;
            (u16::from_le_bytes([b[0], b[1]]) as usize, 10)
        }
        2 | 3 => {
            let b = bytes
                .get(8..12)
                .ok_or(NpyError::Truncated("header length"))?;
            (u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as usize, 12)
        }
        _ => return Err(NpyError::Version(major, minor)),
    };
    if header_len > MAX_HEADER {
        return Err(NpyError::Header(format!(
            "header of {header_len} bytes is longer than the {MAX_HEADER} tarn accepts"
        )));
    }
    let header_end = header_start + header_len;
    let header = bytes
        .get(header_start..header_end)
        .ok_or(NpyError::Truncated("header"))?;
    let header = std::str::from_utf8(header)
        .map_err(|_| NpyError::Header("header is not UTF-8 text".into()))?;
    let parsed = parse_header(header)?;
    let dtype = Dtype::parse(&parsed.descr)?;
    let count = parsed
        .shape
        .iter()
        .try_fold(1usize, |acc, &n| acc.checked_mul(n))
        .ok_or_else(|| NpyError::Header("shape overflows".into()))?;
    let want = count
        .checked_mul(dtype.size())
        .ok_or_else(|| NpyError::Header("shape overflows".into()))?;
    let body = &bytes[header_end..];
    if body.len() != want {
        return Err(NpyError::BodySize {
            shape: parsed.shape,
            want,
            got: body.len(),
        });
    }
    let mut data: Vec<f64> = body
        .chunks_exact(dtype.size())
        .map(|c| dtype.decode(c))
        .collect();
    if parsed.fortran_order && parsed.shape.len() > 1 {
        data = fortran_to_c(&data, &parsed.shape);
    }
    Ok(Array {
        shape: parsed.shape,
        data,
    })
}

/// Reorders a column-major buffer into row-major order.
fn fortran_to_c(data: &[f64], shape: &[usize]) -> Vec<f64> {
    let mut out = vec![0.0; data.len()];
    let rank = shape.len();
    let mut idx = vec![0usize; rank];
    for (c_pos, slot) in out.iter_mut().enumerate() {
        let mut rem = c_pos;
        for axis in (0..rank).rev() {
            idx[axis] = rem % shape[axis];
            rem /= shape[axis];
        }
        let mut f_pos = 0;
        let mut stride = 1;
        for axis in 0..rank {
            f_pos += idx[axis] * stride;
            stride *= shape[axis];
        }
        *slot = data[f_pos];
    }
    out
}

struct Header {
    descr: String,
    fortran_order: bool,
    shape: Vec<usize>,
}

/// Parses the Python-literal dictionary of an `.npy` header, e.g.
/// `{'descr': '<f8', 'fortran_order': False, 'shape': (3, 2), }`.
fn parse_header(text: &str) -> Result<Header, NpyError> {
    let bad = |m: &str| NpyError::Header(m.to_string());
    let body = text.trim_end_matches(['\n', ' ', '\0']).trim();
    let inner = body
        .strip_prefix('{')
        .and_then(|s| s.strip_suffix('}'))
        .ok_or_else(|| bad("header is not a {...} dictionary"))?;
    let mut descr = None;
    let mut fortran = None;
    let mut shape = None;
    let mut rest = inner.trim();
    while !rest.is_empty() {
        let (key, after) = take_quoted(rest).ok_or_else(|| bad("expected a quoted key"))?;
        let after = after
            .trim_start()
            .strip_prefix(':')
            .ok_or_else(|| bad("expected ':' after a key"))?
            .trim_start();
        let after = match key {
            "descr" => {
                let (v, a) = take_quoted(after).ok_or_else(|| bad("descr is not a string"))?;
                descr = Some(v.to_string());
                a
            }
            "fortran_order" => {
                if let Some(a) = after.strip_prefix("True") {
                    fortran = Some(true);
                    a
                } else if let Some(a) = after.strip_prefix("False") {
                    fortran = Some(false);
                    a
                } else {
                    return Err(bad("fortran_order is not True or False"));
                }
            }
            "shape" => {
                let (v, a) = take_tuple(after)?;
                shape = Some(v);
                a
            }
            other => return Err(NpyError::Header(format!("unexpected key '{other}'"))),
        };
        rest = after.trim_start();
        rest = rest.strip_prefix(',').unwrap_or(rest).trim_start();
    }
    Ok(Header {
        descr: descr.ok_or_else(|| bad("missing 'descr'"))?,
        fortran_order: fortran.ok_or_else(|| bad("missing 'fortran_order'"))?,
        shape: shape.ok_or_else(|| bad("missing 'shape'"))?,
    })
}

fn take_quoted(s: &str) -> Option<(&str, &str)> {
    let q = s.chars().next().filter(|c| *c == '\'' || *c == '"')?;
    let end = s[1..].find(q)? + 1;
    Some((&s[1..end], &s[end + 1..]))
}

fn take_tuple(s: &str) -> Result<(Vec<usize>, &str), NpyError> {
    let bad = |m: &str| NpyError::Header(m.to_string());
    let s = s
        .strip_prefix('(')
        .ok_or_else(|| bad("shape is not a tuple"))?;
    let end = s
        .find(')')
        .ok_or_else(|| bad("shape tuple is not closed"))?;
    let mut dims = Vec::new();
    for part in s[..end].split(',') {
        let part = part.trim();
        if part.is_empty() {
            continue;
        }
        let n: usize = part
            .trim_end_matches('L')
            .parse()
            .map_err(|_| NpyError::Header(format!("shape entry '{part}' is not a whole number")))?;
        dims.push(n);
    }
    if dims.len() > 4 {
        return Err(bad("arrays of rank above 4 are not accepted"));
    }
    Ok((dims, &s[end + 1..]))
}

/// Encodes an array as a version 1.0 `.npy` file of little-endian float64.
pub fn encode_f64(array: &Array) -> Vec<u8> {
    encode(&array.shape, "<f8", |out| {
        for v in &array.data {
            out.extend_from_slice(&v.to_le_bytes());
        }
    })
}

/// Encodes integer labels as a version 1.0 `.npy` file of little-endian int64.
pub fn encode_i64(shape: &[usize], data: &[i64]) -> Vec<u8> {
    encode(shape, "<i8", |out| {
        for v in data {
            out.extend_from_slice(&v.to_le_bytes());
        }
    })
}

fn encode(shape: &[usize], descr: &str, body: impl FnOnce(&mut Vec<u8>)) -> Vec<u8> {
    let shape_text = match shape.len() {
        1 => format!("({},)", shape[0]),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|n| n.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut header =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_text}, }}");
    // NumPy pads the header with spaces so that the data starts on a 64-byte boundary.
    let unpadded = MAGIC.len() + 4 + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut out = Vec::with_capacity(MAGIC.len() + 4 + header.len());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&[1, 0]);
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    body(&mut out);
    out
}

/// Reads an `.npy` file, refusing files larger than `max_bytes`.
pub fn read_file(path: &Path, max_bytes: u64) -> Result<Array, String> {
    let meta = std::fs::metadata(path).map_err(|e| format!("cannot read: {e}"))?;
    if meta.len() > max_bytes {
        return Err(format!(
            "file of {} bytes exceeds the limit of {max_bytes} bytes",
            meta.len()
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| format!("cannot read: {e}"))?;
    decode(&bytes).map_err(|e| e.to_string())
}

/// Writes bytes to `path` through a temporary file and a rename, so that a reader never
/// sees a half-written file. There is no fsync: a worker's files only need to survive
/// until tarn has read them and committed them to the store (which is durable); after a
/// machine crash the task simply runs again.
pub fn write_file_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let tmp = path.with_extension("tmp-write");
    {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
    }
    std::fs::rename(&tmp, path)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn numpy_header_of_a_2d_float_array_is_understood() {
        // Header text exactly as numpy 1.26 writes it for np.zeros((3, 2)).
        let mut bytes = MAGIC.to_vec();
        let header = "{'descr': '<f8', 'fortran_order': False, 'shape': (3, 2), }";
        let mut h = header.to_string();
        h.push_str(&" ".repeat(117 - h.len()));
        h.push('\n');
        bytes.extend_from_slice(&[1, 0]);
        bytes.extend_from_slice(&(h.len() as u16).to_le_bytes());
        bytes.extend_from_slice(h.as_bytes());
        for i in 0..6 {
            bytes.extend_from_slice(&(i as f64).to_le_bytes());
        }
        let a = decode(&bytes).unwrap();
        assert_eq!(a.shape, vec![3, 2]);
        assert_eq!(a.data, vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
    }

    #[test]
    fn encoded_data_starts_on_a_64_byte_boundary() {
        let bytes = encode_f64(&Array::matrix(2, 3, vec![1.0; 6]));
        assert_eq!((bytes.len() - 48) % 64, 0);
        assert_eq!(bytes.len() - 48, 128);
    }

    #[test]
    fn fortran_order_is_transposed_into_row_major() {
        let data = fortran_to_c(&[1.0, 4.0, 2.0, 5.0, 3.0, 6.0], &[2, 3]);
        assert_eq!(data, vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
    }

    #[test]
    fn short_body_names_both_sizes() {
        let mut bytes = encode_f64(&Array::vector(vec![1.0, 2.0]));
        bytes.truncate(bytes.len() - 3);
        assert_eq!(
            decode(&bytes),
            Err(NpyError::BodySize {
                shape: vec![2],
                want: 16,
                got: 13
            })
        );
    }

    #[test]
    fn big_endian_is_refused_by_name() {
        let bytes = encode(&[1], ">f8", |o| o.extend_from_slice(&[0; 8]));
        assert_eq!(decode(&bytes), Err(NpyError::Dtype(">f8".into())));
    }

    proptest! {
        #[test]
        fn float_arrays_round_trip(rows in 0usize..6, cols in 1usize..5, seed in any::<u64>()) {
            let data: Vec<f64> = (0..rows * cols)
                .map(|i| f64::from_bits(seed.wrapping_mul(i as u64 + 1) | 1) % 1e6)
                .collect();
            let a = Array::matrix(rows, cols, data);
            let back = decode(&encode_f64(&a)).unwrap();
            prop_assert_eq!(back.shape, a.shape);
            prop_assert_eq!(back.data.len(), a.data.len());
            for (x, y) in back.data.iter().zip(&a.data) {
                prop_assert!(x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan()));
            }
        }

        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
            let _ = decode(&bytes);
        }
    }
}
