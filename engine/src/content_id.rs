//! Content ids: a 128-bit name for a quad's content, the same in any
//! process on any day, and the state digest built on them.
//!
//! Definition (README.md, "Digest", repeats it for other programs):
//! - a leaf (level 3, 8×8 cells) hashes the 12 bytes `level as u32 LE`
//!   then its cells as a `u64 LE` whose bit `y*8 + x` is the cell at column
//!   x, row y of the leaf (so byte y is row y, bit x of it column x);
//! - an inner quad of level n ≥ 4 hashes the 68 bytes `n as u32 LE` then the
//!   content ids of its children nw, ne, sw, se (16 bytes each);
//! - the content id is the first 16 bytes of the BLAKE3 hash of those bytes.

use std::fmt;
use std::str::FromStr;

/// The 128-bit content id of a quad; printed as 32 lowercase hex digits.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct ContentId(pub [u8; 16]);

impl ContentId {
    /// The id of a leaf with these cells (bit `y*8 + x`).
    pub fn of_leaf(bits: u64) -> ContentId {
        let mut bytes = [0u8; 12];
        bytes[..4].copy_from_slice(&crate::LEAF_LEVEL.to_le_bytes());
        bytes[4..].copy_from_slice(&bits.to_le_bytes());
        ContentId::of_bytes(&bytes)
    }

    /// The id of an inner quad of `level` with these children's ids.
    pub fn of_inner(level: u32, kids: [ContentId; 4]) -> ContentId {
        let mut bytes = [0u8; 68];
        bytes[..4].copy_from_slice(&level.to_le_bytes());
        for (at, kid) in kids.iter().enumerate() {
            bytes[4 + 16 * at..20 + 16 * at].copy_from_slice(&kid.0);
        }
        ContentId::of_bytes(&bytes)
    }

    fn of_bytes(bytes: &[u8]) -> ContentId {
        let hash = blake3::hash(bytes);
        let mut id = [0u8; 16];
        id.copy_from_slice(&hash.as_bytes()[..16]);
        ContentId(id)
    }

    /// The first 8 hex digits, for logs.
    pub fn short(&self) -> String {
        self.to_string()[..8].to_string()
    }
}

impl fmt::Display for ContentId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for byte in self.0 {
            write!(f, "{byte:02x}")?;
        }
        Ok(())
    }
}

impl fmt::Debug for ContentId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "ContentId({self})")
    }
}

/// A content id text that is not 32 hex digits.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("content id {0:?} is not 32 hex digits")]
pub struct BadContentId(pub String);

impl FromStr for ContentId {
    type Err = BadContentId;

    fn from_str(text: &str) -> Result<ContentId, BadContentId> {
        let bad = || BadContentId(text.to_string());
        if text.len() != 32 || !text.is_ascii() {
            return Err(bad());
        }
        let mut id = [0u8; 16];
        for (at, byte) in id.iter_mut().enumerate() {
            *byte = u8::from_str_radix(&text[2 * at..2 * at + 2], 16).map_err(|_| bad())?;
        }
        Ok(ContentId(id))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_round_trip() {
        let id = ContentId::of_leaf(0x8142_2418_1824_4281);
        let text = id.to_string();
        assert_eq!(text.len(), 32);
        assert_eq!(text.parse::<ContentId>().unwrap(), id);
        assert!("xyz".parse::<ContentId>().is_err());
        assert!("g".repeat(32).parse::<ContentId>().is_err());
    }

    #[test]
    fn the_leaf_bytes_are_as_documented() {
        // The definition, spelled out independently: BLAKE3 of 12 bytes.
        let mut bytes = vec![3, 0, 0, 0];
        bytes.extend_from_slice(&[1, 0, 0, 0, 0, 0, 0, 0x80]);
        let expected = blake3::hash(&bytes);
        let id = ContentId::of_leaf(1 | 1 << 63);
        assert_eq!(&id.0[..], &expected.as_bytes()[..16]);
    }
}
