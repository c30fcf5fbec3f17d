//! The command line: one module per command or family of commands. `main.rs` parses and
//! dispatches; each module holds its commands' arguments, logic and printing.

pub(crate) mod archive;
pub(crate) mod arl;
pub(crate) mod attribute;
pub(crate) mod backtest;
pub(crate) mod chart;
pub(crate) mod daemon;
pub(crate) mod report;
pub(crate) mod study;

/// The name in `known` closest to `given` (at most a third of its letters off), for "did you
/// mean".
pub(crate) fn nearest<'a>(given: &str, known: impl Iterator<Item = &'a str>) -> Option<&'a str> {
    fn distance(a: &str, b: &str) -> usize {
        let b: Vec<char> = b.chars().collect();
        let mut row: Vec<usize> = (0..=b.len()).collect();
        for (i, ca) in a.chars().enumerate() {
            let mut prev = row[0];
            row[0] = i + 1;
            for j in 0..b.len() {
                let here = row[j + 1];
                row[j + 1] = (prev + usize::from(ca != b[j]))
                    .min(row[j] + 1)
                    .min(here + 1);
                prev = here;
            }
        }
        row[b.len()]
    }
    known
        .map(|k| (distance(given, k), k))
        .filter(|(d, _)| *d <= given.chars().count().div_ceil(3))
        .min_by_key(|(d, _)| *d)
        .map(|(_, k)| k)
}
