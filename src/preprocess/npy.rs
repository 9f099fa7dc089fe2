//! NumPy's `.npy` format (version 1.0; 2.0 when the header passes 65535 bytes), for
//! `lineside preprocess --out tensor.npy`.
//!
//! Layout, as NumPy's format documentation specifies it: the magic `\x93NUMPY`, the version
//! bytes 1 and 0, a little-endian u16 header length, then a Python dict literal with `descr`,
//! `fortran_order` and `shape`, padded with spaces and ended by `\n` so that the data starts
//! on a 64-byte boundary; then the C-order data.

use crate::model::Tensor;

/// Encode one tensor with `shape` as `.npy` bytes: `<f4` for floats, `|u1` for bytes.
///
/// # Panics
/// Never for a shape whose product is the tensor's length; a mismatch is a caller bug and asserted.
pub fn encode(shape: &[usize], tensor: &Tensor) -> Vec<u8> {
    let elements = shape.iter().try_fold(1usize, |n, &d| n.checked_mul(d));
    assert_eq!(elements, Some(tensor.len()), "npy: shape does not match the data");
    let descr = match tensor {
        Tensor::F32(_) => "<f4",
        Tensor::U8(_) => "|u1",
    };
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    // A one-element tuple needs its trailing comma in Python syntax.
    let tuple = if dims.len() == 1 { format!("({},)", dims[0]) } else { format!("({})", dims.join(", ")) };
    let mut header = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}, }}");
    // magic (6) + version (2) + length (2, or 4 in version 2.0) + header + '\n' is a
    // multiple of 64. Version 1.0's u16 length holds any header a model's shape makes.
    let pad = |prefix: usize, header: &str| (64 - (prefix + header.len() + 1) % 64) % 64;
    let v1 = 10 + header.len() + 1 + pad(10, &header) <= 10 + usize::from(u16::MAX);
    let prefix = if v1 { 10 } else { 12 };
    header.push_str(&" ".repeat(pad(prefix, &header)));
    header.push('\n');
    let mut out = Vec::with_capacity(prefix + header.len() + tensor.len() * 4);
    match u16::try_from(header.len()) {
        Ok(len) if v1 => {
            out.extend_from_slice(b"\x93NUMPY\x01\x00");
            out.extend_from_slice(&len.to_le_bytes());
        }
        _ => {
            out.extend_from_slice(b"\x93NUMPY\x02\x00");
            out.extend_from_slice(&u32::try_from(header.len()).unwrap_or(u32::MAX).to_le_bytes());
        }
    }
    out.extend_from_slice(header.as_bytes());
    match tensor {
        Tensor::F32(values) => values.iter().for_each(|v| out.extend_from_slice(&v.to_le_bytes())),
        Tensor::U8(values) => out.extend_from_slice(values),
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_is_aligned_and_readable() {
        let b = encode(&[1, 3, 2, 2], &Tensor::F32(vec![0.5; 12]));
        assert_eq!(&b[..8], b"\x93NUMPY\x01\x00");
        let len = usize::from(u16::from_le_bytes([b[8], b[9]]));
        assert_eq!((10 + len) % 64, 0);
        let header = std::str::from_utf8(&b[10..10 + len]).unwrap();
        assert!(header.starts_with("{'descr': '<f4', 'fortran_order': False, 'shape': (1, 3, 2, 2), }"), "{header}");
        assert!(header.ends_with('\n'));
        assert_eq!(b.len(), 10 + len + 12 * 4);
        assert_eq!(&b[10 + len..10 + len + 4], &0.5f32.to_le_bytes());
        let u = encode(&[2], &Tensor::U8(vec![255, 0]));
        assert!(String::from_utf8_lossy(&u).contains("{'descr': '|u1', 'fortran_order': False, 'shape': (2,), }"));
        assert_eq!(&u[u.len() - 2..], &[255, 0]);
    }

    #[test]
    fn a_header_past_65535_bytes_is_written_as_version_2() {
        // numpy.lib.format: version 2.0 has a 4-byte little-endian header length.
        let shape = vec![1usize; 25_000];
        let b = encode(&shape, &Tensor::U8(vec![7]));
        assert_eq!(&b[..8], b"\x93NUMPY\x02\x00");
        let len = u32::from_le_bytes([b[8], b[9], b[10], b[11]]) as usize;
        assert!(len > usize::from(u16::MAX));
        assert_eq!((12 + len) % 64, 0);
        assert_eq!(&b[12 + len..], &[7]);
    }
}
