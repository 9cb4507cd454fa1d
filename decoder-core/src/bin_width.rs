//! The bin width, in one unit with one rule for equality. Model files and
//! calibration blocks state it in milliseconds, the bin packet and the
//! session log in microseconds, the engine's clock runs in nanoseconds and
//! the filters' physics in seconds; every one of them converts from and to
//! this type, which holds whole microseconds. Two bin widths are the same
//! when their microseconds are, so a model trained on 20 ms bins runs on
//! packets that say 20 000 µs and on nothing else.
//!
//! The serde adaptors keep each file's own unit on disk (`as_ms`, `as_us`,
//! `as_ns`, `as_seconds`), so the byte layouts of PROTOCOL.md §7 and §8 are unchanged.

use std::fmt;

/// A bin width of whole microseconds, from 0.1 ms to 10 s.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct BinWidth(u32);

/// The shortest bin width accepted: 0.1 ms (no front end bins finer).
pub const MIN_US: u32 = 100;
/// The longest bin width accepted: 10 s.
pub const MAX_US: u32 = 10_000_000;

#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum BinWidthError {
    #[error("bin width {value} ms is not a positive finite number of milliseconds")]
    NotPositive { value: f64 },
    #[error("bin width {value} ms is not a whole number of microseconds")]
    NotWholeMicroseconds { value: f64 },
    #[error("bin width {us} µs is outside 0.1 ms ..= 10 s")]
    OutOfRange { us: u64 },
}

impl BinWidth {
    /// From whole microseconds.
    pub const fn from_us(us: u32) -> Result<BinWidth, BinWidthError> {
        if us < MIN_US || us > MAX_US {
            return Err(BinWidthError::OutOfRange { us: us as u64 });
        }
        Ok(BinWidth(us))
    }

    /// From milliseconds, which must be whole microseconds (20.0, 0.5,
    /// 16.667 are; 16.6667 is not).
    pub fn from_ms(ms: f64) -> Result<BinWidth, BinWidthError> {
        if !(ms.is_finite() && ms > 0.0) {
            return Err(BinWidthError::NotPositive { value: ms });
        }
        let us = ms * 1000.0;
        let whole = us.round();
        // Decimal milliseconds are not exact in binary: allow the rounding
        // of a value typed with three decimals, no more.
        if (us - whole).abs() > 1e-6 * whole.max(1.0) {
            return Err(BinWidthError::NotWholeMicroseconds { value: ms });
        }
        if whole < MIN_US as f64 || whole > MAX_US as f64 {
            return Err(BinWidthError::OutOfRange { us: whole as u64 });
        }
        Ok(BinWidth(whole as u32))
    }

    /// From nanoseconds, which must be whole microseconds.
    pub fn from_ns(ns: u64) -> Result<BinWidth, BinWidthError> {
        if ns % 1000 != 0 {
            return Err(BinWidthError::NotWholeMicroseconds {
                value: ns as f64 / 1e6,
            });
        }
        let us = ns / 1000;
        if us < MIN_US as u64 || us > MAX_US as u64 {
            return Err(BinWidthError::OutOfRange { us });
        }
        Ok(BinWidth(us as u32))
    }

    pub const fn us(self) -> u32 {
        self.0
    }

    pub const fn ns(self) -> u64 {
        self.0 as u64 * 1000
    }

    pub fn ms(self) -> f64 {
        self.0 as f64 / 1000.0
    }

    pub fn seconds(self) -> f64 {
        self.0 as f64 / 1e6
    }

    /// Bins per second.
    pub fn rate_hz(self) -> f64 {
        1e6 / self.0 as f64
    }

    /// Whole milliseconds, when it is that (the simulator's grid).
    pub fn whole_ms(self) -> Option<u32> {
        (self.0 % 1000 == 0).then_some(self.0 / 1000)
    }
}

impl fmt::Display for BinWidth {
    /// "20 ms", "0.5 ms", "16.667 ms".
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} ms", self.ms())
    }
}

/// On disk as f64 milliseconds (model file, PROTOCOL.md §8).
pub mod as_ms {
    use super::BinWidth;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(w: &BinWidth, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_f64(w.ms())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<BinWidth, D::Error> {
        BinWidth::from_ms(f64::deserialize(d)?).map_err(serde::de::Error::custom)
    }
}

/// On disk as u32 microseconds (session log header, PROTOCOL.md §7).
pub mod as_us {
    use super::BinWidth;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(w: &BinWidth, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_u32(w.us())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<BinWidth, D::Error> {
        BinWidth::from_us(u32::deserialize(d)?).map_err(serde::de::Error::custom)
    }
}

/// On disk as u64 nanoseconds (engine settings in the log header).
pub mod as_ns {
    use super::BinWidth;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(w: &BinWidth, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_u64(w.ns())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<BinWidth, D::Error> {
        BinWidth::from_ns(u64::deserialize(d)?).map_err(serde::de::Error::custom)
    }
}

/// On disk as f64 seconds (safety limits in the log header).
pub mod as_seconds {
    use super::BinWidth;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(w: &BinWidth, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_f64(w.seconds())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<BinWidth, D::Error> {
        BinWidth::from_ms(f64::deserialize(d)? * 1000.0).map_err(serde::de::Error::custom)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_unit_names_the_same_width() {
        let w = BinWidth::from_ms(20.0).unwrap();
        assert_eq!(w, BinWidth::from_us(20_000).unwrap());
        assert_eq!(w, BinWidth::from_ns(20_000_000).unwrap());
        assert_eq!(
            (w.us(), w.ns(), w.ms(), w.seconds()),
            (20_000, 20_000_000, 20.0, 0.02)
        );
        assert_eq!(w.to_string(), "20 ms");
        assert_eq!(BinWidth::from_ms(0.5).unwrap().us(), 500);
        assert_eq!(BinWidth::from_ms(16.667).unwrap().us(), 16_667);
    }

    #[test]
    fn widths_that_are_not_whole_microseconds_are_refused() {
        assert!(matches!(
            BinWidth::from_ms(16.6667),
            Err(BinWidthError::NotWholeMicroseconds { .. })
        ));
        assert!(BinWidth::from_ns(1_500).is_err());
        for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            assert!(BinWidth::from_ms(bad).is_err(), "{bad}");
        }
        assert!(BinWidth::from_us(0).is_err());
        assert!(BinWidth::from_ms(10_001.0).is_err());
        assert!(BinWidth::from_ms(0.05).is_err());
        assert!(BinWidth::from_ms(0.1).is_ok() && BinWidth::from_ms(10_000.0).is_ok());
    }
}
