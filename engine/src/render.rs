//! Pictures of a state: each pixel is an aligned square of 2^scale × 2^scale
//! cells, shaded by the share of its cells that live. The shares come from
//! the quads' populations, so a picture of a pattern 2^40 cells wide takes
//! as long as one of a pattern 2^10 wide: only quads down to the pixel's
//! level are visited.

use std::collections::HashMap;

use num_bigint::{BigInt, BigUint};
use num_traits::{One, Signed, ToPrimitive};

use crate::pack::ReadError;
use crate::store::LEAF_LEVEL;
use crate::universe::Universe;
use crate::view::{QuadView, StoreView, descend};

/// Pictures wider or taller than this are refused (ask for a larger scale).
pub const MAX_PIXELS: u32 = 16_384;

/// A picture: `columns × rows` live-cell shares between 0 and 1, row-major.
pub struct Picture {
    pub columns: u32,
    pub rows: u32,
    pub shares: Vec<f32>,
}

/// Why a picture cannot be drawn.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum RenderError {
    #[error(
        "a picture of {columns}×{rows} pixels is too large (at most {MAX_PIXELS} each way): give a larger scale"
    )]
    TooLarge { columns: u64, rows: u64 },
    #[error("scale {0} is too large (at most 2^21)")]
    Scale(u32),
    #[error(transparent)]
    Read(#[from] ReadError),
}

impl Universe {
    /// The picture of the cells from (`left`, `top`), `columns` × `rows`
    /// pixels of 2^`scale` cells each way. `left` and `top` are rounded
    /// down to multiples of 2^scale so that each pixel is one quad.
    pub fn picture(
        &self,
        left: &BigInt,
        top: &BigInt,
        columns: u64,
        rows: u64,
        scale: u32,
    ) -> Result<Picture, RenderError> {
        let mut view = StoreView::new(&self.store, self.root, self.level);
        picture_of(&mut view, left, top, columns, rows, scale)
    }
}

/// The picture of the cells from (`left`, `top`) of any quadtree view (see
/// `Universe::picture`): only quads down to the pixel's level are visited.
pub(crate) fn picture_of<V: QuadView>(
    view: &mut V,
    left: &BigInt,
    top: &BigInt,
    columns: u64,
    rows: u64,
    scale: u32,
) -> Result<Picture, RenderError> {
    let (root, root_level) = view.root();
    {
        if scale > 1 << 21 {
            return Err(RenderError::Scale(scale));
        }
        if columns > MAX_PIXELS as u64 || rows > MAX_PIXELS as u64 {
            return Err(RenderError::TooLarge { columns, rows });
        }
        let (columns, rows) = (columns as u32, rows as u32);
        let mut picture = Picture {
            columns,
            rows,
            shares: vec![0.0; columns as usize * rows as usize],
        };
        if columns == 0 || rows == 0 {
            return Ok(picture);
        }
        // The window in pixels from the root's corner (may start outside it).
        let half = BigInt::one() << (root_level - 1);
        let pixel = BigInt::one() << scale;
        let floor_div = |value: BigInt| {
            let quotient = &value / &pixel;
            if value.is_negative() && &quotient * &pixel != value {
                quotient - 1
            } else {
                quotient
            }
        };
        let px = floor_div(left + &half);
        let py = floor_div(top + &half);
        // Cover the window with at most 2×2 aligned squares of BLOCK levels
        // above the pixel (each 2^15 pixels wide, more than the window).
        const BLOCK: u32 = 15;
        let mut painter = Painter {
            view,
            scale,
            window: (0, 0, columns as i64, rows as i64),
            picture: &mut picture,
            counts: HashMap::default(),
        };
        if root_level <= scale {
            // The root is at most a pixel: each child lies whole in one of
            // the four pixels around the origin (absolute pixel -1 or 0).
            let left_pixel = floor_div(left.clone());
            let top_pixel = floor_div(top.clone());
            let kids = painter.view.kids(root, root_level)?;
            for (at, kid) in kids.into_iter().enumerate() {
                let x = BigInt::from(at as i64 % 2 - 1) - &left_pixel;
                let y = BigInt::from(at as i64 / 2 - 1) - &top_pixel;
                if let (Some(x), Some(y)) = (x.to_i64(), y.to_i64()) {
                    let population = painter.view.population(kid, root_level - 1)?;
                    let share = share_of(&population, scale);
                    painter.add(x, y, share);
                }
            }
            return Ok(picture);
        }
        let top_level = scale + BLOCK;
        if root_level <= top_level {
            // The whole root: its corner is pixel 0.
            let offset = (
                px.to_i64().unwrap_or(i64::MAX),
                py.to_i64().unwrap_or(i64::MAX),
            );
            painter.paint(root, root_level, (-offset.0, -offset.1))?;
            return Ok(picture);
        }
        let zero = BigInt::from(0);
        let clip_x = std::cmp::max(px.clone(), zero.clone());
        let clip_y = std::cmp::max(py.clone(), zero);
        let origin_x = (clip_x.magnitude() >> BLOCK) << BLOCK;
        let origin_y = (clip_y.magnitude() >> BLOCK) << BLOCK;
        let side = BigUint::one() << BLOCK;
        for (dx, dy) in [(0u32, 0u32), (1, 0), (0, 1), (1, 1)] {
            let x = &origin_x + &side * dx;
            let y = &origin_y + &side * dy;
            // In cells, for the descent.
            let cell_x = &x << scale;
            let cell_y = &y << scale;
            let Some(quad) = descend(painter.view, cell_x, cell_y, top_level)? else {
                continue;
            };
            let corner = (
                (BigInt::from(x) - &px).to_i64(),
                (BigInt::from(y) - &py).to_i64(),
            );
            if let (Some(cx), Some(cy)) = corner {
                painter.paint(quad, top_level, (cx, cy))?;
            }
        }
        Ok(picture)
    }
}

/// `population` over 4^level, kept above zero when anything lives (so
/// sparse life still shows).
fn share_of(population: &BigUint, level: u32) -> f32 {
    let dropped = population.bits().saturating_sub(60);
    let mantissa = (population >> dropped).to_f64().unwrap_or(0.0);
    let exponent = 2 * level as i64 - dropped as i64;
    let share = if exponent > 1000 {
        0.0
    } else {
        mantissa * 2f64.powi(-(exponent as i32))
    };
    if population.bits() > 0 {
        (share as f32).max(f32::MIN_POSITIVE)
    } else {
        0.0
    }
}

struct Painter<'a, V: QuadView> {
    view: &'a mut V,
    scale: u32,
    /// pixels to fill: 0 ≤ x < window.2, 0 ≤ y < window.3
    window: (i64, i64, i64, i64),
    picture: &'a mut Picture,
    counts: HashMap<V::Node, f32, ahash::RandomState>,
}

impl<V: QuadView> Painter<'_, V> {
    /// Paints `quad` (of `level` ≥ scale) whose corner is pixel `corner`.
    fn paint(&mut self, quad: V::Node, level: u32, corner: (i64, i64)) -> Result<(), ReadError> {
        debug_assert!(level >= self.scale.min(LEAF_LEVEL));
        let span = 1i64 << (level.saturating_sub(self.scale)).min(62);
        let (x, y) = corner;
        if x >= self.window.2 || y >= self.window.3 || x + span <= 0 || y + span <= 0 {
            return Ok(());
        }
        if self.view.is_empty(quad, level) {
            return Ok(());
        }
        if level == self.scale || (level == LEAF_LEVEL && self.scale < LEAF_LEVEL) {
            if level == self.scale {
                let share = self.share(quad, level)?;
                self.put(x, y, share);
            } else {
                self.paint_leaf(quad, corner)?;
            }
            return Ok(());
        }
        let half = span / 2;
        for (at, kid) in self.view.kids(quad, level)?.into_iter().enumerate() {
            let (dx, dy) = ((at as i64 % 2) * half, (at as i64 / 2) * half);
            self.paint(kid, level - 1, (x + dx, y + dy))?;
        }
        Ok(())
    }

    /// A leaf drawn at a scale below 3: blocks of 2^scale cells.
    fn paint_leaf(&mut self, leaf: V::Node, corner: (i64, i64)) -> Result<(), ReadError> {
        let bits = self.view.leaf_bits(leaf)?;
        let cell = 1u32 << self.scale;
        let per_side = 8 / cell;
        for by in 0..per_side {
            for bx in 0..per_side {
                let mut count = 0;
                for y in 0..cell {
                    for x in 0..cell {
                        let (cx, cy) = (bx * cell + x, by * cell + y);
                        count += (bits >> (cy * 8 + cx)) & 1;
                    }
                }
                let share = count as f32 / (cell * cell) as f32;
                self.put(corner.0 + bx as i64, corner.1 + by as i64, share);
            }
        }
        Ok(())
    }

    /// The share of live cells in a quad of the pixel's level.
    fn share(&mut self, quad: V::Node, level: u32) -> Result<f32, ReadError> {
        if let Some(&share) = self.counts.get(&quad) {
            return Ok(share);
        }
        let population = self.view.population(quad, level)?;
        let share = share_of(&population, level);
        self.counts.insert(quad, share);
        Ok(share)
    }

    /// Adds to a pixel's share (several small quads in one pixel).
    fn add(&mut self, x: i64, y: i64, share: f32) {
        if x >= 0 && y >= 0 && x < self.window.2 && y < self.window.3 {
            let at = y as usize * self.picture.columns as usize + x as usize;
            let total = self.picture.shares[at] + share;
            self.picture.shares[at] = total.min(1.0);
        }
    }

    fn put(&mut self, x: i64, y: i64, share: f32) {
        if x >= 0 && y >= 0 && x < self.window.2 && y < self.window.3 {
            let at = y as usize * self.picture.columns as usize + x as usize;
            self.picture.shares[at] = share;
        }
    }
}
