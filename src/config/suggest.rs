//! "Did you mean …?" for misspelt keys and values.

/// Levenshtein edit distance.
pub fn distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut prev = row[0];
        row[0] = i + 1;
        for (j, &cb) in b.iter().enumerate() {
            let cur = row[j + 1];
            row[j + 1] = if ca == cb {
                prev
            } else {
                1 + prev.min(row[j]).min(cur)
            };
            prev = cur;
        }
    }
    row[b.len()]
}

/// The candidate closest to `word`, if it is reasonably close.
pub fn nearest<'a>(word: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let best = candidates
        .into_iter()
        .map(|c| (distance(word, c), c))
        .min_by_key(|(d, _)| *d)?;
    let limit = (word.chars().count() / 2).max(2);
    (best.0 <= limit).then_some(best.1)
}

#[cfg(test)]
mod tests {
    use super::*;
    #[test]
    fn edit_distance() {
        assert_eq!(distance("kitten", "sitting"), 3);
        assert_eq!(distance("", "abc"), 3);
        assert_eq!(distance("timestep_fs", "timestpe_fs"), 2);
        assert_eq!(nearest("sead", ["seed", "trajectories"]), Some("seed"));
        assert_eq!(nearest("zzzzzzzz", ["seed"]), None);
    }
}
