//! [`TextColumn`]: a column of strings kept in one buffer.
//!
//! A million ids or split values as separate `String`s cost a million
//! allocations and about 40 bytes each; here they cost their bytes and one
//! offset each, and blocks parsed on different cores join by two copies.

/// The values of one text column, in row order.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TextColumn {
    /// Every value's bytes, back to back.
    bytes: String,
    /// Where each value ends in `bytes`.
    ends: Vec<usize>,
}

impl TextColumn {
    /// An empty column with room for `rows` values of `bytes` bytes in all.
    pub fn with_capacity(rows: usize, bytes: usize) -> Self {
        TextColumn {
            bytes: String::with_capacity(bytes),
            ends: Vec::with_capacity(rows),
        }
    }

    /// A column from its bytes and where each value ends; `None` unless the
    /// ends ascend, fall on character boundaries and the last is the end.
    pub(crate) fn from_parts(bytes: String, ends: Vec<usize>) -> Option<Self> {
        let mut last = 0;
        for &e in &ends {
            if e < last || !bytes.is_char_boundary(e) {
                return None;
            }
            last = e;
        }
        (last == bytes.len()).then_some(TextColumn { bytes, ends })
    }

    /// Number of values.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    /// `true` when the column holds no value.
    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    /// Value `i`.
    ///
    /// # Panics
    /// When `i` is out of range, like slice indexing.
    pub fn get(&self, i: usize) -> &str {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.bytes[start..self.ends[i]]
    }

    /// Every value's bytes, back to back.
    pub fn joined(&self) -> &str {
        &self.bytes
    }

    /// Bytes held by all values together.
    pub fn bytes_len(&self) -> usize {
        self.bytes.len()
    }

    /// Keeps the first `rows` values.
    pub fn truncate(&mut self, rows: usize) {
        if rows < self.len() {
            self.ends.truncate(rows);
            self.bytes.truncate(self.ends.last().copied().unwrap_or(0));
        }
    }

    /// Appends a value.
    pub fn push(&mut self, s: &str) {
        self.bytes.push_str(s);
        self.ends.push(self.bytes.len());
    }

    /// Appends every value of `other`, in order.
    pub fn append(&mut self, other: &TextColumn) {
        let base = self.bytes.len();
        self.bytes.push_str(&other.bytes);
        self.ends.extend(other.ends.iter().map(|e| e + base));
    }

    /// The values in row order.
    pub fn iter(&self) -> impl ExactSizeIterator<Item = &str> + DoubleEndedIterator + '_ {
        (0..self.len()).map(move |i| self.get(i))
    }

    /// The values of rows `keep`, in that order.
    pub fn pick(&self, keep: &[usize]) -> TextColumn {
        let mut out = TextColumn::with_capacity(keep.len(), 0);
        for &i in keep {
            out.push(self.get(i));
        }
        out
    }
}

impl std::ops::Index<usize> for TextColumn {
    type Output = str;
    fn index(&self, i: usize) -> &str {
        self.get(i)
    }
}

impl<S: AsRef<str>> FromIterator<S> for TextColumn {
    fn from_iter<I: IntoIterator<Item = S>>(iter: I) -> Self {
        let mut out = TextColumn::default();
        out.extend(iter);
        out
    }
}

impl<S: AsRef<str>> Extend<S> for TextColumn {
    fn extend<I: IntoIterator<Item = S>>(&mut self, iter: I) {
        for s in iter {
            self.push(s.as_ref());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_round_trip_in_order() {
        let values = ["a", "", "größe", "r-17", ""];
        let mut c: TextColumn = values[..2].iter().collect();
        let rest: TextColumn = values[2..].iter().collect();
        c.append(&rest);
        assert_eq!(c.len(), 5);
        assert_eq!(c.iter().collect::<Vec<_>>(), values);
        assert_eq!(&c[2], "größe");
        assert_eq!(c.pick(&[3, 0]).iter().collect::<Vec<_>>(), ["r-17", "a"]);
        assert!(TextColumn::default().is_empty());
        assert!(TextColumn::from_parts("abc".into(), vec![1, 3]).is_some());
        assert!(TextColumn::from_parts("abc".into(), vec![2, 1, 3]).is_none());
        assert!(TextColumn::from_parts("abc".into(), vec![1]).is_none());
        assert!(TextColumn::from_parts("ö".into(), vec![1, 2]).is_none());
        c.truncate(3);
        assert_eq!(c.iter().collect::<Vec<_>>(), ["a", "", "größe"]);
        assert_eq!(c.bytes_len(), "agröße".len());
    }
}
