//! Small attachment payloads: a PDF-shaped document, a valid PNG and a valid stored ZIP.
//!
//! They are small (a few kilobytes at most) because their job is to give the MIME walk real
//! binary parts to skip, not to be opened; the PNG and ZIP are nevertheless well-formed so a
//! tool that does inspect them sees ordinary files.

use super::rng::Rng;

/// CRC-32 (IEEE 802.3, reflected, as PNG and ZIP use it), bit by bit: the payloads are tiny.
fn crc32(data: &[u8]) -> u32 {
    let mut crc = 0xffff_ffffu32;
    for &b in data {
        crc ^= u32::from(b);
        for _ in 0..8 {
            let mask = (crc & 1).wrapping_neg();
            crc = (crc >> 1) ^ (0xedb8_8320 & mask);
        }
    }
    !crc
}

fn adler32(data: &[u8]) -> u32 {
    let (mut a, mut b) = (1u32, 0u32);
    for &x in data {
        a = (a + u32::from(x)) % 65_521;
        b = (b + a) % 65_521;
    }
    (b << 16) | a
}

/// A zlib stream made of stored (uncompressed) deflate blocks (RFC 1950, RFC 1951 §3.2.4).
fn zlib_stored(data: &[u8]) -> Vec<u8> {
    let mut out = vec![0x78, 0x01];
    let mut chunks = data.chunks(65_535).peekable();
    if chunks.peek().is_none() {
        out.extend_from_slice(&[1, 0, 0, 0xff, 0xff]);
    }
    while let Some(chunk) = chunks.next() {
        let last = chunks.peek().is_none();
        out.push(u8::from(last));
        let len = chunk.len() as u16;
        out.extend_from_slice(&len.to_le_bytes());
        out.extend_from_slice(&(!len).to_le_bytes());
        out.extend_from_slice(chunk);
    }
    out.extend_from_slice(&adler32(data).to_be_bytes());
    out
}

fn png_chunk(out: &mut Vec<u8>, kind: &[u8; 4], data: &[u8]) {
    out.extend_from_slice(&(data.len() as u32).to_be_bytes());
    let start = out.len();
    out.extend_from_slice(kind);
    out.extend_from_slice(data);
    let crc = crc32(out.get(start..).unwrap_or_default());
    out.extend_from_slice(&crc.to_be_bytes());
}

/// A `width`×`height` truecolour PNG of soft horizontal bands with a little noise.
pub(crate) fn png(rng: &mut Rng, width: u32, height: u32) -> Vec<u8> {
    let mut out = b"\x89PNG\r\n\x1a\n".to_vec();
    let mut ihdr = Vec::with_capacity(13);
    ihdr.extend_from_slice(&width.to_be_bytes());
    ihdr.extend_from_slice(&height.to_be_bytes());
    ihdr.extend_from_slice(&[8, 2, 0, 0, 0]);
    png_chunk(&mut out, b"IHDR", &ihdr);
    let base = rng.bytes(3);
    let mut raw = Vec::with_capacity((height * (width * 3 + 1)) as usize);
    for y in 0..height {
        raw.push(0); // filter type None
        for _ in 0..width {
            for c in &base {
                let jitter = (rng.next_u64() & 7) as u8;
                raw.push(
                    c.wrapping_add((y as u8).wrapping_mul(3))
                        .wrapping_add(jitter),
                );
            }
        }
    }
    png_chunk(&mut out, b"IDAT", &zlib_stored(&raw));
    png_chunk(&mut out, b"IEND", &[]);
    out
}

/// A PDF-shaped file: the header, a few objects with a text stream and a trailer.
///
/// The cross-reference offsets are computed, so the file is structurally plausible; the
/// stream is uncompressed text, as the simplest generators write it.
pub(crate) fn pdf(rng: &mut Rng, lines: &[String]) -> Vec<u8> {
    let mut out = b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n".to_vec();
    let mut offsets = Vec::new();
    let mut stream = String::from("BT /F1 10 Tf 50 780 Td 14 TL\n");
    for line in lines {
        let safe: String = line
            .chars()
            .filter(|c| c.is_ascii() && !matches!(c, '(' | ')' | '\\'))
            .collect();
        stream.push_str(&format!("({safe}) '\n"));
    }
    stream.push_str("ET\n");
    let objects = [
        "<< /Type /Catalog /Pages 2 0 R >>".to_string(),
        "<< /Type /Pages /Kids [3 0 R] /Count 1 >>".to_string(),
        "<< /Type /Page /Parent 2 0 R /MediaBox [0 0 595 842] /Contents 4 0 R \
         /Resources << /Font << /F1 5 0 R >> >> >>"
            .to_string(),
        format!("<< /Length {} >>\nstream\n{stream}endstream", stream.len()),
        "<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica >>".to_string(),
    ];
    for (i, body) in objects.iter().enumerate() {
        offsets.push(out.len());
        out.extend_from_slice(format!("{} 0 obj\n{body}\nendobj\n", i + 1).as_bytes());
    }
    // A binary metadata stream so the part is not all text, as real PDFs rarely are.
    let noise = {
        let n = rng.range(300, 1500);
        rng.bytes(n)
    };
    offsets.push(out.len());
    out.extend_from_slice(format!("6 0 obj\n<< /Length {} >>\nstream\n", noise.len()).as_bytes());
    out.extend_from_slice(&noise);
    out.extend_from_slice(b"\nendstream\nendobj\n");
    let xref = out.len();
    out.extend_from_slice(
        format!("xref\n0 {}\n0000000000 65535 f \n", offsets.len() + 1).as_bytes(),
    );
    for off in &offsets {
        out.extend_from_slice(format!("{off:010} 00000 n \n").as_bytes());
    }
    out.extend_from_slice(
        format!(
            "trailer\n<< /Size {} /Root 1 0 R >>\nstartxref\n{xref}\n%%EOF\n",
            offsets.len() + 1
        )
        .as_bytes(),
    );
    out
}

/// A ZIP archive (PKWARE APPNOTE 4.3) holding `files` uncompressed.
pub(crate) fn zip(files: &[(String, Vec<u8>)]) -> Vec<u8> {
    let mut out = Vec::new();
    let mut central = Vec::new();
    for (name, data) in files {
        let offset = out.len() as u32;
        let crc = crc32(data);
        let size = data.len() as u32;
        let name_len = name.len() as u16;
        // Local file header.
        out.extend_from_slice(&0x0403_4b50u32.to_le_bytes());
        out.extend_from_slice(&[20, 0, 0, 0, 0, 0]); // version, flags, method = stored
        out.extend_from_slice(&[0x00, 0x60, 0x62, 0x5c]); // DOS time and date
        out.extend_from_slice(&crc.to_le_bytes());
        out.extend_from_slice(&size.to_le_bytes());
        out.extend_from_slice(&size.to_le_bytes());
        out.extend_from_slice(&name_len.to_le_bytes());
        out.extend_from_slice(&0u16.to_le_bytes());
        out.extend_from_slice(name.as_bytes());
        out.extend_from_slice(data);
        // Central directory entry.
        central.extend_from_slice(&0x0201_4b50u32.to_le_bytes());
        central.extend_from_slice(&[20, 0, 20, 0, 0, 0, 0, 0]);
        central.extend_from_slice(&[0x00, 0x60, 0x62, 0x5c]);
        central.extend_from_slice(&crc.to_le_bytes());
        central.extend_from_slice(&size.to_le_bytes());
        central.extend_from_slice(&size.to_le_bytes());
        central.extend_from_slice(&name_len.to_le_bytes());
        central.extend_from_slice(&[0; 12]); // extra, comment, disk, attributes
        central.extend_from_slice(&offset.to_le_bytes());
        central.extend_from_slice(name.as_bytes());
    }
    let central_offset = out.len() as u32;
    let central_len = central.len() as u32;
    out.extend_from_slice(&central);
    out.extend_from_slice(&0x0605_4b50u32.to_le_bytes());
    out.extend_from_slice(&[0; 4]);
    let count = files.len() as u16;
    out.extend_from_slice(&count.to_le_bytes());
    out.extend_from_slice(&count.to_le_bytes());
    out.extend_from_slice(&central_len.to_le_bytes());
    out.extend_from_slice(&central_offset.to_le_bytes());
    out.extend_from_slice(&0u16.to_le_bytes());
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crc32_check_value() {
        // The standard check value of CRC-32/ISO-HDLC for "123456789".
        assert_eq!(crc32(b"123456789"), 0xcbf4_3926);
    }

    #[test]
    fn adler32_reference_value() {
        // RFC 1950 Adler-32 of "Wikipedia", a widely quoted worked example.
        assert_eq!(adler32(b"Wikipedia"), 0x11e6_0398);
    }

    #[test]
    fn payloads_have_their_magic() {
        let mut rng = Rng::new(5);
        assert!(png(&mut rng, 4, 4).starts_with(b"\x89PNG\r\n\x1a\n"));
        assert!(pdf(&mut rng, &["hello".to_string()]).starts_with(b"%PDF-1.4"));
        assert!(zip(&[("a.txt".to_string(), b"hi".to_vec())]).starts_with(b"PK\x03\x04"));
    }
}
