//! The 51 orbits of the 256 neighbourhoods under the eight symmetries of
//! the square, worked out while the program compiles, and an orbit matched
//! over 64 cells with its arrangements known to the compiler. An isotropic
//! rule's fixes are whole orbits (a letter of Hensel notation is one), so a
//! fix can be matched orbit by orbit in code made for each: the compiler
//! then loads each neighbour plane once and shares what the arrangements
//! have in common, where matching arrangements read from a list at run
//! time loads a plane for every cell of every arrangement (B3/S2-i34q:
//! 11% fewer kernel instructions on AVX2, 12% less HashLife time on
//! AVX-512; see DEVELOPERS.md).

use super::letters::symmetries;

/// The orbits: 1 + 2 + 6 + 10 + 13 + 10 + 6 + 2 + 1 for the counts 0 to 8.
pub(crate) const ORBITS: usize = 51;

/// An orbit: its `len` distinct arrangements (the rest repeat the first).
#[derive(Clone, Copy)]
pub(crate) struct Orbit {
    pub len: usize,
    pub members: [u8; 8],
}

/// Every orbit, in the order of its smallest arrangement.
pub(crate) const TABLE: [Orbit; ORBITS] = table();

const fn table() -> [Orbit; ORBITS] {
    let mut table = [Orbit {
        len: 0,
        members: [0; 8],
    }; ORBITS];
    let mut found = 0;
    let mut n = 0;
    while n < 256 {
        let first = n as u8;
        let images = symmetries(first);
        let mut least = first;
        let mut k = 0;
        while k < 8 {
            if images[k] < least {
                least = images[k];
            }
            k += 1;
        }
        // An orbit is found at its smallest arrangement.
        if least == first {
            let mut orbit = Orbit {
                len: 0,
                members: [first; 8],
            };
            let mut k = 0;
            while k < 8 {
                let mut seen = false;
                let mut j = 0;
                while j < orbit.len {
                    seen |= orbit.members[j] == images[k];
                    j += 1;
                }
                if !seen {
                    orbit.members[orbit.len] = images[k];
                    orbit.len += 1;
                }
                k += 1;
            }
            table[found] = orbit;
            found += 1;
        }
        n += 1;
    }
    assert!(found == ORBITS, "the square's symmetries make 51 orbits");
    table
}

/// The orbit of a neighbourhood.
pub(crate) fn orbit_of(neighbourhood: u8) -> usize {
    TABLE
        .iter()
        .position(|orbit| orbit.members[..orbit.len].contains(&neighbourhood))
        .expect("every neighbourhood is in an orbit")
}

/// Where any arrangement of orbit O matches, given the eight neighbour
/// planes of 64 cells known to have its count: each told by its live
/// neighbours up to a count of 4, else by its dead ones (fewer).
#[inline(always)]
pub(crate) fn matches<const O: usize>(planes: &[u64; 8]) -> u64 {
    let orbit = TABLE[O];
    let count = orbit.members[0].count_ones();
    let mut any = 0;
    for &arrangement in &orbit.members[..orbit.len] {
        let mut all = u64::MAX;
        for (bit, &plane) in planes.iter().enumerate() {
            let live = arrangement >> bit & 1 == 1;
            if count <= 4 && live {
                all &= plane;
            }
            if count > 4 && !live {
                all &= !plane;
            }
        }
        any |= all;
    }
    any
}

/// Calls `$run::<.., O>(..)` for the orbit `$orbit` (a run-time value), so
/// that each orbit's code is made for it.
macro_rules! for_orbit {
    ($orbit:expr, $run:ident::<$l:ident>($($arg:expr),*)) => {
        for_orbit!(@arms $orbit, $run, $l, ($($arg),*), [0 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16 17 18 19 20 21 22 23 24 25 26 27 28 29 30 31 32 33 34 35 36 37 38 39 40 41 42 43 44 45 46 47 48 49 50])
    };
    (@arms $orbit:expr, $run:ident, $l:ident, $args:tt, [$($n:literal)*]) => {
        match $orbit {
            $($n => $run::<$l, $n> $args,)*
            _ => unreachable!("there are 51 orbits"),
        }
    };
}
pub(crate) use for_orbit;

#[cfg(test)]
mod tests {
    use super::*;

    // Every neighbourhood lies in exactly one orbit, each orbit is closed
    // under the symmetries, and the orbits of each count match the letters
    // of Hensel notation (LifeWiki, "Isotropic non-totalistic rule": 1, 2,
    // 6, 10, 13, 10, 6, 2 and 1 configurations for the counts 0 to 8).
    #[test]
    fn orbits_split_the_neighbourhoods_as_the_letters_do() {
        let mut seen = [0; 256];
        let mut by_count = [0; 9];
        for orbit in TABLE {
            by_count[orbit.members[0].count_ones() as usize] += 1;
            for &member in &orbit.members[..orbit.len] {
                seen[member as usize] += 1;
                for image in symmetries(member) {
                    assert!(orbit.members[..orbit.len].contains(&image));
                }
            }
        }
        assert!(seen.iter().all(|&times| times == 1));
        assert_eq!(by_count, [1, 2, 6, 10, 13, 10, 6, 2, 1]);
    }
}
