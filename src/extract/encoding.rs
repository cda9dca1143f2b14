//! Decoding cells that are not UTF-8: the legacy single-byte encodings that older reporting
//! systems still export. Tables only; no IO.

use std::borrow::Cow;

use super::mapping::LegacyEncoding;

/// Windows-1252 code points for bytes 0x80..=0x9F (the WHATWG Encoding Standard's index;
/// the five undefined bytes map to their C1 control code points, as browsers do).
const WINDOWS_1252_HIGH: [char; 32] = [
    '\u{20AC}', '\u{0081}', '\u{201A}', '\u{0192}', '\u{201E}', '\u{2026}', '\u{2020}', '\u{2021}',
    '\u{02C6}', '\u{2030}', '\u{0160}', '\u{2039}', '\u{0152}', '\u{008D}', '\u{017D}', '\u{008F}',
    '\u{0090}', '\u{2018}', '\u{2019}', '\u{201C}', '\u{201D}', '\u{2022}', '\u{2013}', '\u{2014}',
    '\u{02DC}', '\u{2122}', '\u{0161}', '\u{203A}', '\u{0153}', '\u{009D}', '\u{017E}', '\u{0178}',
];

/// Decodes bytes in a single-byte legacy encoding. Every byte maps to a character, so this
/// cannot fail; callers use it only after UTF-8 decoding failed.
pub fn decode_legacy(bytes: &[u8], encoding: LegacyEncoding) -> String {
    bytes
        .iter()
        .map(|&byte| match (encoding, byte) {
            (LegacyEncoding::Windows1252, 0x80..=0x9F) => WINDOWS_1252_HIGH[(byte - 0x80) as usize],
            _ => char::from(byte),
        })
        .collect()
}

/// UTF-8 first (borrowed, no copy), then the configured fallback; `None` when neither applies.
pub fn decode_cell(bytes: &[u8], fallback: Option<LegacyEncoding>) -> Option<Cow<'_, str>> {
    match std::str::from_utf8(bytes) {
        Ok(text) => Some(Cow::Borrowed(text)),
        Err(_) => fallback.map(|encoding| Cow::Owned(decode_legacy(bytes, encoding))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn windows_1252_and_latin1() {
        // "Café – €5" in Windows-1252: é = 0xE9, en dash = 0x96, euro = 0x80.
        let bytes = b"Caf\xe9 \x96 \x805";
        assert_eq!(decode_legacy(bytes, LegacyEncoding::Windows1252), "Café – €5");
        assert_eq!(decode_legacy(b"Caf\xe9", LegacyEncoding::Latin1), "Café");
        assert_eq!(decode_cell(b"Caf\xe9", None), None);
        assert_eq!(decode_cell("Café".as_bytes(), None).as_deref(), Some("Café"));
    }
}
