//! The figures of a rectangle of a state: the number and bounding box of
//! its cells that differ from the background (the live ones, but under a
//! B0 rule at an alive background), for states in memory and stored ones
//! alike.

use num_bigint::{BigInt, BigUint};

use crate::stored::StoredState;
use crate::universe::{BoundingBox, Region, Universe, WriteError, rows_in};
use crate::view::{QuadView, StoreView};

/// The number and bounding box of the cells inside `region` that differ
/// from the background,
/// found from its rows of runs (so within text's limits: a region at most
/// 2^40 cells each way holding at most 2^26 live cells).
fn figures_in<V: QuadView>(
    view: &mut V,
    region: &Region,
) -> Result<(u64, Option<BoundingBox>), WriteError> {
    let rows = rows_in(view, region)?;
    let mut population = 0u64;
    let mut extent: Option<(u64, u64, u64, u64)> = None;
    for (y, runs) in rows {
        for (x, len) in runs {
            population += len;
            let (left, top, right, bottom) = extent.unwrap_or((x, y, x + len - 1, y));
            extent = Some((
                left.min(x),
                top.min(y),
                right.max(x + len - 1),
                bottom.max(y),
            ));
        }
    }
    let bbox = extent.map(|(left, top, right, bottom)| BoundingBox {
        left: &region.left + BigInt::from(left),
        top: &region.top + BigInt::from(top),
        width: BigUint::from(right - left + 1),
        height: BigUint::from(bottom - top + 1),
    });
    Ok((population, bbox))
}

impl Universe {
    /// The count and bounding box of the cells in `region` that differ
    /// from the background.
    pub fn region_figures(
        &self,
        region: &Region,
    ) -> Result<(u64, Option<BoundingBox>), WriteError> {
        figures_in(
            &mut StoreView::new(&self.store, self.root, self.level),
            region,
        )
    }
}

impl StoredState<'_> {
    /// The count and bounding box of the cells in `region` that differ
    /// from the background, reading only the quads that overlap it.
    pub fn region_figures(
        &mut self,
        region: &Region,
    ) -> Result<(u64, Option<BoundingBox>), WriteError> {
        figures_in(self, region)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::read_pattern;
    use crate::rule::Rule;

    #[test]
    fn a_rectangle_counts_only_its_cells() {
        // Two blocks 10 cells apart; a rectangle over the right one and
        // half of nothing else (common practice: count by hand).
        let pattern = read_pattern(b"x = 12, y = 2\n2o8b2o$2o8b2o!", 1 << 20).unwrap();
        let universe = Universe::from_pattern(&pattern, Rule::LIFE, 1 << 24).unwrap();
        let region = Region {
            left: BigInt::from(5),
            top: BigInt::from(-3),
            width: 20,
            height: 10,
        };
        let (population, bbox) = universe.region_figures(&region).unwrap();
        assert_eq!(population, 4);
        let bbox = bbox.unwrap();
        assert_eq!((bbox.left, bbox.top), (BigInt::from(10), BigInt::from(0)));
        assert_eq!(
            (bbox.width, bbox.height),
            (BigUint::from(2u32), BigUint::from(2u32))
        );
        let empty = Region {
            left: BigInt::from(3),
            top: BigInt::from(0),
            width: 5,
            height: 2,
        };
        assert_eq!(universe.region_figures(&empty).unwrap(), (0, None));
    }
}
