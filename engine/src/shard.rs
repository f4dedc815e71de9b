//! Shards: splitting a campaign of trials or realizations across machines. Shard I of N takes a
//! contiguous block of the global indices, so shards merge back in order; together with
//! generators seeded by (seed, index) alone (`rng.rs`), merged shards equal the unsharded run.

use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::ops::Range;

/// Most shards a campaign may be split into.
pub const MAX_SHARDS: u64 = 1_000_000;

/// Shard `index` (1-based) of `count`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    pub index: u64,
    pub count: u64,
}

impl Shard {
    /// The whole campaign in one shard.
    pub const ALL: Shard = Shard { index: 1, count: 1 };

    /// Parse `I/N` with 1 <= I <= N.
    pub fn parse(text: &str) -> Result<Shard> {
        let bad = || {
            Error::setting(
                "shard",
                format!("expected I/N with 1 <= I <= N, got {text:?}"),
            )
        };
        let (i, n) = text.split_once('/').ok_or_else(bad)?;
        let index: u64 = i.trim().parse().map_err(|_| bad())?;
        let count: u64 = n.trim().parse().map_err(|_| bad())?;
        if index == 0 || count == 0 || index > count {
            return Err(bad());
        }
        if count > MAX_SHARDS {
            return Err(Error::setting(
                "shard",
                format!("at most {MAX_SHARDS} shards, got {count}"),
            ));
        }
        Ok(Shard { index, count })
    }

    /// Check a shard read back from a file against its campaign of `total` trials or
    /// realizations: 1 <= I <= N <= min(total, MAX_SHARDS). The message gives the allowed range.
    pub fn check(&self, total: u64) -> std::result::Result<(), String> {
        let max = total.clamp(1, MAX_SHARDS);
        if self.count == 0 || self.count > max {
            return Err(format!(
                "shard count {} is outside 1..={max} (at most one shard per trial, at most {MAX_SHARDS})",
                self.count
            ));
        }
        if self.index == 0 || self.index > self.count {
            return Err(format!(
                "shard index {} is outside 1..={}",
                self.index, self.count
            ));
        }
        Ok(())
    }

    /// The global indices of this shard out of `total`: [floor((I-1) n / N), floor(I n / N)).
    pub fn range(&self, total: u64) -> Range<u64> {
        let lo = ((self.index - 1) as u128 * total as u128 / self.count as u128) as u64;
        let hi = (self.index as u128 * total as u128 / self.count as u128) as u64;
        lo..hi
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shards_tile_the_indices_in_order() {
        for total in [0u64, 1, 7, 8, 1000] {
            let mut next = 0;
            for i in 1..=3 {
                let r = Shard { index: i, count: 3 }.range(total);
                assert_eq!(r.start, next);
                next = r.end;
            }
            assert_eq!(next, total);
        }
        assert_eq!(Shard::parse("2/3").unwrap().range(8), 2..5);
        for bad in ["0/3", "4/3", "1", "a/b", "1/0"] {
            assert!(Shard::parse(bad).is_err(), "{bad}");
        }
    }
}
