//! [`SensorSet`]: which of a site's sensors have contributed to a track, as a fixed-size bit set
//! (no allocation per track or per picture, `Copy`).

/// Largest number of sensors one tracker takes (the width of [`SensorSet`]).
pub const MAX_SENSORS: usize = 128;

/// A set of sensor indices below [`MAX_SENSORS`], iterated in ascending order.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Hash)]
pub struct SensorSet(u128);

impl SensorSet {
    /// The empty set.
    pub const fn new() -> Self {
        Self(0)
    }

    /// Add sensor `index`; indices at or above [`MAX_SENSORS`] are ignored (the tracker refuses
    /// such configurations, so it never passes one).
    pub fn insert(&mut self, index: usize) {
        if index < MAX_SENSORS {
            self.0 |= 1u128 << index;
        }
    }

    /// Whether sensor `index` is in the set.
    pub fn contains(&self, index: usize) -> bool {
        index < MAX_SENSORS && self.0 & (1u128 << index) != 0
    }

    /// Number of sensors in the set.
    pub fn len(&self) -> usize {
        self.0.count_ones() as usize
    }

    /// Whether the set is empty.
    pub fn is_empty(&self) -> bool {
        self.0 == 0
    }

    /// The sensor indices, ascending.
    pub fn iter(&self) -> impl Iterator<Item = usize> + '_ {
        let mut bits = self.0;
        std::iter::from_fn(move || {
            if bits == 0 {
                return None;
            }
            let i = bits.trailing_zeros() as usize;
            bits &= bits - 1;
            Some(i)
        })
    }

    /// The raw bits (bit i = sensor i), e.g. for a snapshot.
    pub fn bits(&self) -> u128 {
        self.0
    }

    /// A set from raw bits (see [`SensorSet::bits`]); bits at or above [`MAX_SENSORS`] are
    /// meaningless and kept as given.
    pub fn from_bits(bits: u128) -> Self {
        Self(bits)
    }
}

impl FromIterator<usize> for SensorSet {
    fn from_iter<I: IntoIterator<Item = usize>>(iter: I) -> Self {
        let mut s = Self::new();
        for i in iter {
            s.insert(i);
        }
        s
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iterates_ascending_and_counts() {
        let s: SensorSet = [5, 0, 127, 5, 64].into_iter().collect();
        assert_eq!(s.iter().collect::<Vec<_>>(), vec![0, 5, 64, 127]);
        assert_eq!(s.len(), 4);
        assert!(s.contains(64) && !s.contains(63) && !s.contains(500));
        let mut t = SensorSet::new();
        assert!(t.is_empty());
        t.insert(MAX_SENSORS);
        assert!(t.is_empty());
        assert_eq!(SensorSet::from_bits(s.bits()), s);
    }
}
