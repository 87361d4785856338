//! Colours of our own, picked in the OKLCH space (lightness, chroma, hue), where equal steps
//! look like equal steps: [`oklch`], and [`type_colour`] for telling part types apart.

use eframe::egui;
use egui::Color32;

/// OKLCH (lightness 0..1, chroma, hue in degrees) to an sRGB colour with `alpha` 0..1,
/// clamped into the sRGB gamut. OKLab to linear sRGB matrices: Björn Ottosson, "A perceptual
/// color space for image processing" (2020), as also given in CSS Color Module Level 4.
pub(crate) fn oklch(l: f32, c: f32, hue_degrees: f32, alpha: f32) -> Color32 {
    let (sin_h, cos_h) = hue_degrees.to_radians().sin_cos();
    let (a, b) = (c * cos_h, c * sin_h);
    let l_ = l + 0.396_337_78 * a + 0.215_803_76 * b;
    let m_ = l - 0.105_561_346 * a - 0.063_854_17 * b;
    let s_ = l - 0.089_484_18 * a - 1.291_485_5 * b;
    let (l3, m3, s3) = (l_ * l_ * l_, m_ * m_ * m_, s_ * s_ * s_);
    let r = 4.076_741_7 * l3 - 3.307_711_6 * m3 + 0.230_969_94 * s3;
    let g = -1.268_438 * l3 + 2.609_757_4 * m3 - 0.341_319_38 * s3;
    let bl = -0.004_196_086_3 * l3 - 0.703_418_6 * m3 + 1.707_614_7 * s3;
    // sRGB transfer function: IEC 61966-2-1.
    let encode = |x: f32| {
        let x = x.clamp(0.0, 1.0);
        let v = if x <= 0.003_130_8 {
            12.92 * x
        } else {
            1.055 * x.powf(1.0 / 2.4) - 0.055
        };
        (v * 255.0).round() as u8
    };
    Color32::from_rgba_unmultiplied(encode(r), encode(g), encode(bl), (alpha * 255.0) as u8)
}

/// A distinct colour for item `index` of `count` (part types on the map, curves on a plot):
/// hues evenly around the circle, at one chroma so none stands out. Past eight, hues would
/// crowd, so every other item is also lighter.
pub(crate) fn type_colour(index: usize, count: usize) -> Color32 {
    let count = count.max(1);
    let hues = count.min(8).max(count.div_ceil(2));
    let hue = 25.0 + 360.0 * (index % hues) as f32 / hues as f32;
    let lightness = if (index / hues).is_multiple_of(2) {
        0.72
    } else {
        0.86
    };
    oklch(lightness, 0.12, hue, 1.0)
}

/// The accent of charts that show one quantity.
pub(crate) fn accent_colour() -> Color32 {
    oklch(0.72, 0.11, 230.0, 1.0)
}

/// A `sure` verdict: a calm green.
pub(crate) fn sure_colour() -> Color32 {
    oklch(0.74, 0.14, 150.0, 1.0)
}

/// A `review` verdict: a loud amber that reads on light and dark backgrounds.
pub(crate) fn review_colour() -> Color32 {
    oklch(0.78, 0.17, 70.0, 1.0)
}

/// Error messages.
pub(crate) fn error_colour() -> Color32 {
    oklch(0.66, 0.19, 28.0, 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn oklch_matches_published_srgb_values() {
        // White and black: OKLab L = 1 and L = 0 with no chroma (Ottosson 2020).
        assert_eq!(oklch(1.0, 0.0, 0.0, 1.0), Color32::WHITE);
        assert_eq!(oklch(0.0, 0.0, 0.0, 1.0), Color32::BLACK);
        // sRGB red is oklch(62.8% 0.2577 29.23) in CSS Color Module Level 4 (recalled from
        // memory, rounded as printed there).
        let red = oklch(0.628, 0.2577, 29.23, 1.0);
        assert!(red.r() >= 253 && red.g() <= 3 && red.b() <= 3, "{red:?}");
    }

    #[test]
    fn type_colours_differ() {
        for count in [1, 3, 6, 8, 12, 20] {
            let colours: Vec<Color32> = (0..count).map(|i| type_colour(i, count)).collect();
            for (i, a) in colours.iter().enumerate() {
                for b in &colours[i + 1..] {
                    assert_ne!(a, b, "{count} types");
                }
            }
        }
    }
}
