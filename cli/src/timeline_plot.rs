//! The timeline's plot: population by generation as a PNG a paper could
//! carry — labelled axes, a log scale on an axis whose values span three
//! decades or more, large values written as M×10^E. Drawn with plotters
//! into memory and encoded with the png crate; the text uses the DejaVu
//! Sans font vendored in `coordinator/fonts/` (its licence beside it), so
//! no system font is needed.

use std::sync::Once;

use anyhow::{Context, bail};
use plotters::coord::ranged1d::{AsRangedCoord, ValueFormatter};
use plotters::prelude::*;

use crate::timeline::{Sample, as_f64};
use deeptime_coordinator::report;

const WIDTH: u32 = 1200;
const HEIGHT: u32 = 750;
static FONT: &[u8] = include_bytes!("../fonts/DejaVuSans.ttf");
static REGISTER: Once = Once::new();

/// Values at least this large are written as M×10^E on the axes.
const PLAIN_BELOW: f64 = 1e6;

/// A value for an axis label: plain below a million, else M×10^E with up
/// to three significant digits.
pub fn label(value: f64) -> String {
    if value.abs() < PLAIN_BELOW {
        if value.fract() == 0.0 {
            return format!("{value:.0}");
        }
        return format!("{value:.2}")
            .trim_end_matches('0')
            .trim_end_matches('.')
            .to_string();
    }
    let exponent = value.abs().log10().floor() as i32;
    let mut mantissa = value / 10f64.powi(exponent);
    let mut exponent = exponent;
    // 9.996 rounds to 10.0: carry into the exponent.
    if (mantissa.abs() * 100.0).round() >= 1000.0 {
        mantissa /= 10.0;
        exponent += 1;
    }
    let text = format!("{mantissa:.2}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "1" {
        format!("10^{exponent}")
    } else {
        format!("{text}×10^{exponent}")
    }
}

/// Whether values from `low` to `high` (both positive) span three decades.
fn spans_decades(low: f64, high: f64) -> bool {
    low > 0.0 && high / low >= 1000.0
}

/// The population by generation as PNG bytes.
pub fn population_png(samples: &[Sample], rule: &str) -> anyhow::Result<Vec<u8>> {
    let mut points = Vec::with_capacity(samples.len());
    // Generations whose background is alive (a B0 rule's) have no finite
    // population: the plot leaves them out.
    for sample in samples.iter().filter(|s| s.population != report::INFINITE) {
        let (Some(x), Some(y)) = (as_f64(&sample.generation), as_f64(&sample.population)) else {
            bail!(
                "generation {} or its population is beyond what a plot can place (10^308)",
                sample.generation
            );
        };
        points.push((x, y));
    }
    let positive_x: Vec<f64> = points.iter().map(|p| p.0).filter(|&x| x > 0.0).collect();
    let (x_low, x_high) = bounds(&positive_x);
    let log_x = positive_x.len() >= 3 && spans_decades(x_low, x_high);
    if log_x {
        // Generation 0 has no place on a log scale.
        points.retain(|p| p.0 > 0.0);
    }
    // The start alone does not make the population's axis logarithmic: a
    // gun's 36 cells beside its 5×10^100 later would squash a straight line.
    let later = if log_x || points.len() < 3 {
        &points[..]
    } else {
        &points[1..]
    };
    let positive_y: Vec<f64> = later.iter().map(|p| p.1).filter(|&y| y > 0.0).collect();
    let (y_low, y_high) = bounds(&positive_y);
    let log_y = points.iter().all(|p| p.1 > 0.0) && spans_decades(y_low, y_high);
    let all_y: Vec<f64> = points.iter().map(|p| p.1).collect();
    let all_x: Vec<f64> = points.iter().map(|p| p.0).collect();
    let (x0, x1) = padded(bounds(&all_x), log_x);
    let (y0, y1) = padded(bounds(&all_y), log_y);
    let mut title = format!("Population by generation, rule {rule}");
    if log_x && samples.first().is_some_and(|s| s.generation == "0") {
        title.push_str(" (generation 0 not shown on the log scale)");
    }
    if samples.iter().any(|s| s.population == report::INFINITE) {
        title.push_str(" (generations with an alive background not shown)");
    }

    REGISTER.call_once(|| {
        // The bytes are a valid font (checked by the tests); a failure here
        // shows as missing text, which the plot's error would name.
        let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, FONT);
    });
    let mut rgb = vec![0u8; (WIDTH * HEIGHT * 3) as usize];
    let parts = Parts {
        points: &points,
        title: &title,
        x_label: if log_x {
            "generation (log scale)"
        } else {
            "generation"
        },
        y_label: if log_y {
            "population, live cells (log scale)"
        } else {
            "population, live cells"
        },
    };
    match (log_x, log_y) {
        (false, false) => draw(&mut rgb, &parts, x0..x1, y0..y1),
        (true, false) => draw(&mut rgb, &parts, (x0..x1).log_scale(), y0..y1),
        (false, true) => draw(&mut rgb, &parts, x0..x1, (y0..y1).log_scale()),
        (true, true) => draw(&mut rgb, &parts, (x0..x1).log_scale(), (y0..y1).log_scale()),
    }?;
    encode(&rgb)
}

struct Parts<'a> {
    points: &'a [(f64, f64)],
    title: &'a str,
    x_label: &'a str,
    y_label: &'a str,
}

fn bounds(values: &[f64]) -> (f64, f64) {
    let low = values.iter().copied().fold(f64::INFINITY, f64::min);
    let high = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if low.is_finite() {
        (low, high)
    } else {
        (0.0, 1.0)
    }
}

/// A range around the values with a margin (a factor on a log scale).
fn padded((low, high): (f64, f64), log: bool) -> (f64, f64) {
    if log {
        return (low / 1.5, high * 1.5);
    }
    if high == low {
        return (low - 1.0, high + 1.0);
    }
    let margin = (high - low) * 0.05;
    let low = if low >= 0.0 {
        (low - margin).max(0.0)
    } else {
        low - margin
    };
    (low, high + margin)
}

fn draw<X, Y>(rgb: &mut [u8], parts: &Parts<'_>, x: X, y: Y) -> anyhow::Result<()>
where
    X: AsRangedCoord<Value = f64>,
    Y: AsRangedCoord<Value = f64>,
    X::CoordDescType: ValueFormatter<f64>,
    Y::CoordDescType: ValueFormatter<f64>,
{
    let plotting = |rgb: &mut [u8]| -> Result<(), Box<dyn std::error::Error>> {
        let root = BitMapBackend::with_buffer(rgb, (WIDTH, HEIGHT)).into_drawing_area();
        root.fill(&WHITE)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(parts.title, ("sans-serif", 26))
            .margin(24)
            .x_label_area_size(70)
            .y_label_area_size(120)
            .build_cartesian_2d(x, y)?;
        chart
            .configure_mesh()
            .x_desc(parts.x_label)
            .y_desc(parts.y_label)
            .axis_desc_style(("sans-serif", 22))
            .label_style(("sans-serif", 17))
            .x_label_formatter(&|v| label(*v))
            .y_label_formatter(&|v| label(*v))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()?;
        let colour = RGBColor(31, 90, 160);
        chart.draw_series(LineSeries::new(
            parts.points.iter().copied(),
            colour.stroke_width(2),
        ))?;
        if parts.points.len() <= 200 {
            chart.draw_series(
                parts
                    .points
                    .iter()
                    .map(|&p| Circle::new(p, 3, colour.filled())),
            )?;
        }
        root.present()?;
        Ok(())
    };
    plotting(rgb).map_err(|error| anyhow::anyhow!("cannot draw the plot: {error}"))
}

fn encode(rgb: &[u8]) -> anyhow::Result<Vec<u8>> {
    let mut bytes = Vec::new();
    {
        let mut encoder = png::Encoder::new(&mut bytes, WIDTH, HEIGHT);
        encoder.set_color(png::ColorType::Rgb);
        encoder.set_depth(png::BitDepth::Eight);
        encoder
            .add_text_chunk(
                "Title".into(),
                "deeptime timeline: population by generation".into(),
            )
            .context("png text")?;
        let mut writer = encoder.write_header().context("png header")?;
        writer.write_image_data(rgb).context("png data")?;
    }
    Ok(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_are_plain_or_powers_of_ten() {
        assert_eq!(label(0.0), "0");
        assert_eq!(label(1103.0), "1103");
        assert_eq!(label(999_999.0), "999999");
        assert_eq!(label(3.5e7), "3.5×10^7");
        assert_eq!(label(1e100), "10^100");
        assert_eq!(label(9.996e9), "10^10");
    }

    #[test]
    fn the_vendored_font_is_a_font() {
        assert!(plotters::style::register_font("sans-serif", FontStyle::Normal, FONT).is_ok());
    }
}
