//! A bitmap font embedded in the source, for chart labels: no system fonts are looked for,
//! so charts render the same on any machine, with or without a display.
//!
//! Glyphs are 5 pixels wide on a 9-row grid: 7 rows from the cap height to the baseline and 2
//! rows of descender below it. They cover printable ASCII (32–126), the degree sign (°) and
//! the en dash (–); any other character is drawn as a hollow box. The designs below are
//! original to this project: `#` is ink, `.` is paper, and each glyph starts with a line
//! `= c` naming its character.

use std::sync::OnceLock;

/// Width of a glyph's ink grid, pixels at scale 1.
pub const GLYPH_WIDTH: u32 = 5;
/// Height of a glyph's grid (cap height plus descender), pixels at scale 1.
pub const GLYPH_HEIGHT: u32 = 9;
/// Rows above the baseline (the cap height), pixels at scale 1.
pub const CAP_HEIGHT: u32 = 7;
/// Horizontal advance from one character to the next, pixels at scale 1.
pub const ADVANCE: u32 = 6;
/// Distance between baselines of successive lines, pixels at scale 1.
pub const LINE_HEIGHT: u32 = 11;

/// One glyph: a row of bits per grid row, top first; bit 4 is the leftmost pixel.
pub type Glyph = [u8; GLYPH_HEIGHT as usize];

/// Drawn for characters the font does not have.
const MISSING: Glyph = [
    0b11111, 0b10001, 0b10001, 0b10001, 0b10001, 0b10001, 0b11111, 0, 0,
];

const SOURCE: &str = r###"
= SPACE
.....
= !
..#..
..#..
..#..
..#..
..#..
.....
..#..
= "
.#.#.
.#.#.
.#.#.
= #
.#.#.
.#.#.
#####
.#.#.
#####
.#.#.
.#.#.
= $
..#..
.####
#.#..
.###.
..#.#
####.
..#..
= %
##...
##..#
...#.
..#..
.#...
#..##
...##
= &
.##..
#..#.
#.#..
.#...
#.#.#
#..#.
.##.#
= '
..#..
..#..
..#..
= (
...#.
..#..
.#...
.#...
.#...
..#..
...#.
= )
.#...
..#..
...#.
...#.
...#.
..#..
.#...
= *
.....
..#..
#.#.#
.###.
#.#.#
..#..
.....
= +
.....
..#..
..#..
#####
..#..
..#..
.....
= ,
.....
.....
.....
.....
.....
..##.
..##.
...#.
..#..
= -
.....
.....
.....
.###.
.....
.....
.....
= .
.....
.....
.....
.....
.....
..##.
..##.
= /
....#
....#
...#.
..#..
.#...
#....
#....
= 0
.###.
#...#
#..##
#.#.#
##..#
#...#
.###.
= 1
..#..
.##..
#.#..
..#..
..#..
..#..
#####
= 2
.###.
#...#
....#
..##.
.#...
#....
#####
= 3
####.
....#
....#
.###.
....#
....#
####.
= 4
...#.
..##.
.#.#.
#..#.
#####
...#.
...#.
= 5
#####
#....
####.
....#
....#
#...#
.###.
= 6
..##.
.#...
#....
####.
#...#
#...#
.###.
= 7
#####
....#
...#.
..#..
..#..
.#...
.#...
= 8
.###.
#...#
#...#
.###.
#...#
#...#
.###.
= 9
.###.
#...#
#...#
.####
....#
...#.
.##..
= :
.....
..##.
..##.
.....
..##.
..##.
.....
= ;
.....
..##.
..##.
.....
..##.
..##.
...#.
..#..
= <
...#.
..#..
.#...
#....
.#...
..#..
...#.
= =
.....
.....
#####
.....
#####
.....
.....
= >
.#...
..#..
...#.
....#
...#.
..#..
.#...
= ?
.###.
#...#
....#
..##.
..#..
.....
..#..
= @
.###.
#...#
#.###
#.#.#
#.###
#....
.####
= A
..#..
.#.#.
#...#
#...#
#####
#...#
#...#
= B
####.
#...#
#...#
####.
#...#
#...#
####.
= C
.####
#....
#....
#....
#....
#....
.####
= D
###..
#..#.
#...#
#...#
#...#
#..#.
###..
= E
#####
#....
#....
####.
#....
#....
#####
= F
#####
#....
#....
####.
#....
#....
#....
= G
.####
#....
#....
#.###
#...#
#...#
.###.
= H
#...#
#...#
#...#
#####
#...#
#...#
#...#
= I
#####
..#..
..#..
..#..
..#..
..#..
#####
= J
..###
...#.
...#.
...#.
...#.
#..#.
.##..
= K
#...#
#..#.
#.#..
##...
#.#..
#..#.
#...#
= L
#....
#....
#....
#....
#....
#....
#####
= M
#...#
##.##
#.#.#
#.#.#
#...#
#...#
#...#
= N
#...#
##..#
#.#.#
#..##
#...#
#...#
#...#
= O
.###.
#...#
#...#
#...#
#...#
#...#
.###.
= P
####.
#...#
#...#
####.
#....
#....
#....
= Q
.###.
#...#
#...#
#...#
#.#.#
#..#.
.##.#
= R
####.
#...#
#...#
####.
#.#..
#..#.
#...#
= S
.####
#....
#....
.###.
....#
....#
####.
= T
#####
..#..
..#..
..#..
..#..
..#..
..#..
= U
#...#
#...#
#...#
#...#
#...#
#...#
.###.
= V
#...#
#...#
#...#
.#.#.
.#.#.
..#..
..#..
= W
#...#
#...#
#...#
#.#.#
#.#.#
#.#.#
.#.#.
= X
#...#
#...#
.#.#.
..#..
.#.#.
#...#
#...#
= Y
#...#
#...#
.#.#.
..#..
..#..
..#..
..#..
= Z
#####
....#
...#.
..#..
.#...
#....
#####
= [
.###.
.#...
.#...
.#...
.#...
.#...
.###.
= \
#....
#....
.#...
..#..
...#.
....#
....#
= ]
.###.
...#.
...#.
...#.
...#.
...#.
.###.
= ^
..#..
.#.#.
#...#
= _
.....
.....
.....
.....
.....
.....
.....
#####
= `
.#...
..#..
...#.
= a
.....
.....
.###.
....#
.####
#...#
.####
= b
#....
#....
####.
#...#
#...#
#...#
####.
= c
.....
.....
.####
#....
#....
#....
.####
= d
....#
....#
.####
#...#
#...#
#...#
.####
= e
.....
.....
.###.
#...#
#####
#....
.###.
= f
..##.
.#...
.#...
####.
.#...
.#...
.#...
= g
.....
.....
.####
#...#
#...#
#...#
.####
....#
.###.
= h
#....
#....
####.
#...#
#...#
#...#
#...#
= i
..#..
.....
.##..
..#..
..#..
..#..
.###.
= j
...#.
.....
..##.
...#.
...#.
...#.
...#.
#..#.
.##..
= k
#....
#....
#..#.
#.#..
##...
#.#..
#..#.
= l
.##..
..#..
..#..
..#..
..#..
..#..
.###.
= m
.....
.....
##.#.
#.#.#
#.#.#
#.#.#
#...#
= n
.....
.....
####.
#...#
#...#
#...#
#...#
= o
.....
.....
.###.
#...#
#...#
#...#
.###.
= p
.....
.....
####.
#...#
#...#
#...#
####.
#....
#....
= q
.....
.....
.####
#...#
#...#
#...#
.####
....#
....#
= r
.....
.....
#.##.
##..#
#....
#....
#....
= s
.....
.....
.####
#....
.###.
....#
####.
= t
.#...
.#...
####.
.#...
.#...
.#...
..##.
= u
.....
.....
#...#
#...#
#...#
#...#
.####
= v
.....
.....
#...#
#...#
.#.#.
.#.#.
..#..
= w
.....
.....
#...#
#...#
#.#.#
#.#.#
.#.#.
= x
.....
.....
#...#
.#.#.
..#..
.#.#.
#...#
= y
.....
.....
#...#
#...#
#...#
#...#
.####
....#
.###.
= z
.....
.....
#####
...#.
..#..
.#...
#####
= {
...##
..#..
..#..
.#...
..#..
..#..
...##
= |
..#..
..#..
..#..
..#..
..#..
..#..
..#..
= }
##...
..#..
..#..
...#.
..#..
..#..
##...
= ~
.....
.....
.#...
#.#.#
...#.
= DEG
.##..
#..#.
#..#.
.##..
= NDASH
.....
.....
.....
#####
"###;

fn table() -> &'static [(char, Glyph)] {
    static TABLE: OnceLock<Vec<(char, Glyph)>> = OnceLock::new();
    TABLE.get_or_init(|| {
        let mut out: Vec<(char, Glyph)> = Vec::new();
        let mut row = 0usize;
        for line in SOURCE.lines().filter(|l| !l.is_empty()) {
            if let Some(name) = line.strip_prefix("= ") {
                let c = match name {
                    "SPACE" => ' ',
                    "DEG" => '\u{b0}',
                    "NDASH" => '\u{2013}',
                    other => other.chars().next().unwrap_or(' '),
                };
                out.push((c, [0; GLYPH_HEIGHT as usize]));
                row = 0;
            } else if let Some((_, glyph)) = out.last_mut() {
                // Rows left out at the bottom of a glyph stay empty.
                if row < glyph.len() {
                    glyph[row] = line
                        .bytes()
                        .fold(0u8, |acc, b| (acc << 1) | u8::from(b == b'#'));
                }
                row += 1;
            }
        }
        out.sort_by_key(|(c, _)| *c);
        out
    })
}

/// The glyph of `c`, or a hollow box when the font has none.
pub fn glyph(c: char) -> &'static Glyph {
    let t = table();
    match t.binary_search_by_key(&c, |(k, _)| *k) {
        Ok(i) => &t[i].1,
        Err(_) => &MISSING,
    }
}

/// Whether the font has a glyph of its own for `c`.
pub fn has_glyph(c: char) -> bool {
    table().binary_search_by_key(&c, |(k, _)| *k).is_ok()
}

/// Width in pixels of `text` on one line at integer `scale` (the advance of every character,
/// less the blank column after the last).
pub fn text_width(text: &str, scale: u32) -> u32 {
    let n = text.chars().count() as u32;
    if n == 0 {
        0
    } else {
        (n * ADVANCE - (ADVANCE - GLYPH_WIDTH)) * scale
    }
}

/// Calls `ink(x, y)` for every inked pixel of `text` drawn at integer `scale`, with `(x, y)`
/// relative to the top-left corner of the first glyph's grid (the baseline lies
/// `CAP_HEIGHT · scale` below it).
pub fn for_each_pixel(text: &str, scale: u32, mut ink: impl FnMut(u32, u32)) {
    let scale = scale.max(1);
    for (n, c) in text.chars().enumerate() {
        let g = glyph(c);
        let x0 = n as u32 * ADVANCE * scale;
        for (r, bits) in g.iter().enumerate() {
            for col in 0..GLYPH_WIDTH {
                if bits >> (GLYPH_WIDTH - 1 - col) & 1 == 1 {
                    for dy in 0..scale {
                        for dx in 0..scale {
                            ink(x0 + col * scale + dx, r as u32 * scale + dy);
                        }
                    }
                }
            }
        }
    }
}

/// Splits `text` into lines no wider than `width_px` at `scale`, breaking at spaces (a word
/// longer than a line is broken where it must be). Existing line breaks are kept.
pub fn wrap_text(text: &str, width_px: u32, scale: u32) -> Vec<String> {
    let per_line = ((width_px / scale.max(1) + (ADVANCE - GLYPH_WIDTH)) / ADVANCE).max(1) as usize;
    let mut lines = Vec::new();
    for paragraph in text.lines() {
        let mut cur = String::new();
        for word in paragraph.split_whitespace() {
            let mut word: Vec<char> = word.chars().collect();
            while word.len() > per_line {
                if !cur.is_empty() {
                    lines.push(std::mem::take(&mut cur));
                }
                let rest = word.split_off(per_line);
                lines.push(word.into_iter().collect());
                word = rest;
            }
            let needed = cur.chars().count() + usize::from(!cur.is_empty()) + word.len();
            if needed > per_line && !cur.is_empty() {
                lines.push(std::mem::take(&mut cur));
            }
            if !cur.is_empty() {
                cur.push(' ');
            }
            cur.extend(word);
        }
        lines.push(cur);
    }
    lines
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_printable_ascii_character_and_the_extras_have_glyphs() {
        for c in (32u8..=126).map(char::from).chain(['\u{b0}', '\u{2013}']) {
            assert!(has_glyph(c), "no glyph for {c:?}");
            if c != ' ' {
                assert!(glyph(c).iter().any(|&r| r != 0), "{c:?} has no ink");
            }
            assert!(glyph(c).iter().all(|&r| r < 32), "{c:?} is wider than 5");
        }
        assert_eq!(table().len(), 97);
        assert!(!has_glyph('\u{e9}'));
        assert_eq!(glyph('\u{e9}'), &MISSING);
    }

    #[test]
    fn glyphs_differ_from_one_another() {
        let t = table();
        for (n, (a, ga)) in t.iter().enumerate() {
            for (b, gb) in &t[n + 1..] {
                assert_ne!(ga, gb, "{a:?} and {b:?} look the same");
            }
        }
    }

    #[test]
    fn widths_and_wrapping() {
        assert_eq!(text_width("", 2), 0);
        assert_eq!(text_width("A", 1), 5);
        assert_eq!(text_width("5400", 2), (4 * 6 - 1) * 2);
        let lines = wrap_text("guidance derived from model fields", 6 * 12 - 1, 1);
        assert_eq!(lines, vec!["guidance", "derived from", "model fields"]);
        assert!(lines.iter().all(|l| text_width(l, 1) <= 71));
        let mut count = 0;
        for_each_pixel("I", 2, |x, y| {
            assert!(x < 10 && y < 18);
            count += 1;
        });
        // 'I' has 5 + 5 + 5 inked pixels at scale 1, four times as many at scale 2.
        assert_eq!(count, 15 * 4);
    }
}
