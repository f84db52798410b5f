//! NumPy `.npz` output: a zip archive (stored, uncompressed) of `.npy` arrays, for Python users.
//!
//! `.npy` layout (NumPy's format specification, version 1.0): the magic `\x93NUMPY`, version
//! bytes 1 and 0, a little-endian `u16` header length, then a Python dict literal
//! `{'descr': '<f8', 'fortran_order': False, 'shape': (2, 3), }` padded with spaces and ended by
//! a newline so that the data start on a multiple of 64 bytes, then the data in C order.
//! The zip container follows the PKWARE APPNOTE: local headers, a central directory and its end
//! record; no compression, fixed timestamps (so the same data give the same bytes).

/// An array's element type.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Dtype {
    /// 64-bit float.
    F64,
    /// 64-bit signed integer.
    I64,
    /// 8-bit signed integer.
    I8,
    /// Boolean (one byte).
    Bool,
}

impl Dtype {
    fn descr(self) -> &'static str {
        match self {
            Dtype::F64 => "<f8",
            Dtype::I64 => "<i8",
            Dtype::I8 => "|i1",
            Dtype::Bool => "|b1",
        }
    }
}

/// The bytes of a `.npy` file holding `data` (already little-endian, C order) of `shape`.
pub fn npy(dtype: Dtype, shape: &[usize], data: &[u8]) -> Vec<u8> {
    let dims = match shape {
        [n] => format!("({n},)"),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|d| d.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut header = format!(
        "{{'descr': '{}', 'fortran_order': False, 'shape': {dims}, }}",
        dtype.descr()
    );
    // Magic (6) + version (2) + length (2) + header + newline: a multiple of 64.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat(unpadded.next_multiple_of(64) - unpadded));
    header.push('\n');
    let mut out = Vec::with_capacity(10 + header.len() + data.len());
    out.extend_from_slice(b"\x93NUMPY\x01\x00");
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    out.extend_from_slice(data);
    out
}

/// Little-endian bytes of floats.
pub fn f64_bytes(values: &[f64]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// Little-endian bytes of integers.
pub fn i64_bytes(values: &[i64]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// CRC-32 (IEEE 802.3, reflected, polynomial 0xEDB88320), as zip requires.
pub fn crc32(bytes: &[u8]) -> u32 {
    let mut table = [0u32; 256];
    for (i, t) in table.iter_mut().enumerate() {
        let mut c = i as u32;
        for _ in 0..8 {
            c = if c & 1 != 0 {
                0xEDB8_8320 ^ (c >> 1)
            } else {
                c >> 1
            };
        }
        *t = c;
    }
    let mut crc = !0u32;
    for &b in bytes {
        crc = table[((crc ^ u32::from(b)) & 0xff) as usize] ^ (crc >> 8);
    }
    !crc
}

/// A zip archive being built in memory, entries stored uncompressed.
#[derive(Default)]
pub struct ZipWriter {
    out: Vec<u8>,
    central: Vec<u8>,
    entries: u16,
}

/// DOS date of 1980-01-01 (the zip epoch), time 00:00: fixed, so output is reproducible.
const DOS_DATE: u16 = (1 << 5) | 1;

/// The archive would pass a limit of the plain zip format (4 GiB, 65,535 entries).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TooLarge;

impl ZipWriter {
    /// Adds a file.
    pub fn add(&mut self, name: &str, data: &[u8]) -> Result<(), TooLarge> {
        let offset = u32::try_from(self.out.len()).map_err(|_| TooLarge)?;
        let size = u32::try_from(data.len()).map_err(|_| TooLarge)?;
        self.entries = self.entries.checked_add(1).ok_or(TooLarge)?;
        let crc = crc32(data);
        let name_len = name.len() as u16;
        let common = |v: &mut Vec<u8>| {
            v.extend_from_slice(&20u16.to_le_bytes()); // version needed: 2.0
            v.extend_from_slice(&0u16.to_le_bytes()); // flags
            v.extend_from_slice(&0u16.to_le_bytes()); // method: stored
            v.extend_from_slice(&0u16.to_le_bytes()); // time
            v.extend_from_slice(&DOS_DATE.to_le_bytes());
            v.extend_from_slice(&crc.to_le_bytes());
            v.extend_from_slice(&size.to_le_bytes()); // compressed
            v.extend_from_slice(&size.to_le_bytes()); // uncompressed
            v.extend_from_slice(&name_len.to_le_bytes());
            v.extend_from_slice(&0u16.to_le_bytes()); // extra length
        };
        self.out.extend_from_slice(&0x0403_4b50u32.to_le_bytes());
        common(&mut self.out);
        self.out.extend_from_slice(name.as_bytes());
        self.out.extend_from_slice(data);
        self.central
            .extend_from_slice(&0x0201_4b50u32.to_le_bytes());
        self.central.extend_from_slice(&20u16.to_le_bytes()); // version made by
        common(&mut self.central);
        self.central.extend_from_slice(&0u16.to_le_bytes()); // comment length
        self.central.extend_from_slice(&0u16.to_le_bytes()); // disk
        self.central.extend_from_slice(&0u16.to_le_bytes()); // internal attributes
        self.central.extend_from_slice(&0u32.to_le_bytes()); // external attributes
        self.central.extend_from_slice(&offset.to_le_bytes());
        self.central.extend_from_slice(name.as_bytes());
        Ok(())
    }

    /// The finished archive.
    pub fn finish(mut self) -> Result<Vec<u8>, TooLarge> {
        let cd_offset = u32::try_from(self.out.len()).map_err(|_| TooLarge)?;
        let cd_size = u32::try_from(self.central.len()).map_err(|_| TooLarge)?;
        u32::try_from(self.out.len() + self.central.len() + 22).map_err(|_| TooLarge)?;
        self.out.extend_from_slice(&self.central);
        self.out.extend_from_slice(&0x0605_4b50u32.to_le_bytes());
        self.out.extend_from_slice(&0u16.to_le_bytes()); // this disk
        self.out.extend_from_slice(&0u16.to_le_bytes()); // disk of the directory
        self.out.extend_from_slice(&self.entries.to_le_bytes());
        self.out.extend_from_slice(&self.entries.to_le_bytes());
        self.out.extend_from_slice(&cd_size.to_le_bytes());
        self.out.extend_from_slice(&cd_offset.to_le_bytes());
        self.out.extend_from_slice(&0u16.to_le_bytes()); // comment length
        Ok(self.out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crc32_gives_the_standard_check_value() {
        // The CRC-32/ISO-HDLC check value: CRC of the ASCII digits "123456789" is 0xCBF43926
        // (the catalogue of parametrised CRC algorithms, "CRC-32/ISO-HDLC").
        assert_eq!(crc32(b"123456789"), 0xCBF4_3926);
        assert_eq!(crc32(b""), 0);
    }

    #[test]
    fn npy_header_is_byte_for_byte_what_numpy_writes() {
        // numpy.save(f, numpy.zeros((2, 3))) with NumPy 2.4 writes this 128-byte header.
        let expected_header = format!(
            "\u{93}NUMPY\u{1}\u{0}v\u{0}{{'descr': '<f8', 'fortran_order': False, 'shape': (2, 3), }}{}\n",
            " ".repeat(58)
        );
        let mut expected: Vec<u8> = expected_header.chars().map(|c| c as u32 as u8).collect();
        expected.extend(std::iter::repeat_n(0u8, 48));
        let got = npy(Dtype::F64, &[2, 3], &f64_bytes(&[0.0; 6]));
        assert_eq!(got.len(), 128 + 48);
        assert_eq!(got, expected);
        // One dimension: a trailing comma, as in Python's tuple syntax.
        let one = npy(Dtype::I64, &[4], &i64_bytes(&[1, 2, 3, 4]));
        let text = String::from_utf8_lossy(&one[10..74]);
        assert!(text.starts_with("{'descr': '<i8', 'fortran_order': False, 'shape': (4,), }"));
    }

    #[test]
    fn zip_directory_points_at_its_entries() {
        let mut z = ZipWriter::default();
        z.add("a.npy", b"hello").unwrap();
        z.add("b.npy", b"world!").unwrap();
        let bytes = z.finish().unwrap();
        let end = bytes.len() - 22;
        assert_eq!(&bytes[end..end + 4], &0x0605_4b50u32.to_le_bytes());
        let entries = u16::from_le_bytes([bytes[end + 10], bytes[end + 11]]);
        assert_eq!(entries, 2);
        let cd_offset = u32::from_le_bytes(bytes[end + 16..end + 20].try_into().unwrap()) as usize;
        assert_eq!(
            &bytes[cd_offset..cd_offset + 4],
            &0x0201_4b50u32.to_le_bytes()
        );
        // The second local header follows the first entry: 30 + 5 (name) + 5 (data).
        assert_eq!(&bytes[40..44], &0x0403_4b50u32.to_le_bytes());
    }
}
