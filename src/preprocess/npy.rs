//! NumPy's `.npy` format (version 1.0), for `lineside preprocess --out tensor.npy`.
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
    assert_eq!(shape.iter().product::<usize>(), tensor.len(), "npy: shape does not match the data");
    let descr = match tensor {
        Tensor::F32(_) => "<f4",
        Tensor::U8(_) => "|u1",
    };
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    // A one-element tuple needs its trailing comma in Python syntax.
    let tuple = if dims.len() == 1 { format!("({},)", dims[0]) } else { format!("({})", dims.join(", ")) };
    let mut header = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}, }}");
    // magic (6) + version (2) + length (2) + header + '\n' is a multiple of 64.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut out = Vec::with_capacity(10 + header.len() + tensor.len() * 4);
    out.extend_from_slice(b"\x93NUMPY\x01\x00");
    // The header of a 4-d shape is far below u16::MAX.
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
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
}
