//! Writes a before/after picture of the clean-up recipe: a raw practice scan as the sensor saw
//! it, coloured by what the recipe did with each point, beside the part alone as it was kept.
//!
//!     cargo run --release --example before_after -- [OUT.png] [PART_TYPE] [SEED]
//!
//! Default: `assets/before-after.png`, a spur gear, seed 7. Views look along the sensor's axis.

use std::path::PathBuf;

use partsift::prep::{Fate, RecipeSettings};
use partsift::synth::{generate_scan, PartType, SensorSettings};

const PANEL: u32 = 480;
const BACKGROUND: [u8; 3] = [24, 26, 30];

/// Our own palette: the part warm white, table slate, strays signal red, other objects amber.
fn fate_colour(fate: Fate) -> [u8; 3] {
    match fate {
        Fate::Part => [236, 232, 220],
        Fate::Table => [92, 108, 128],
        Fate::Stray => [230, 60, 50],
        Fate::OtherCluster => [240, 170, 40],
        Fate::NonFinite | Fate::Cropped => [70, 70, 70],
    }
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut args = std::env::args().skip(1);
    let out = PathBuf::from(
        args.next()
            .unwrap_or_else(|| "assets/before-after.png".into()),
    );
    let part: PartType = args.next().unwrap_or_else(|| "spur_gear".into()).parse()?;
    let seed: u64 = args.next().map(|s| s.parse()).transpose()?.unwrap_or(7);

    let cloud = generate_scan(part, seed, &SensorSettings::default())?;
    let recipe = RecipeSettings::default().check()?;
    let prepared = recipe.run(&cloud)?;

    // One framing for both panels: the bounds of the raw scan in the image plane (x right, y down).
    let bounds = cloud.bounds().ok_or("empty scan")?;
    let mut image = vec![BACKGROUND; (2 * PANEL * PANEL) as usize];
    let mut depth = vec![f32::INFINITY; image.len()];
    let scale =
        (PANEL as f32 - 20.0) / (bounds[1][0] - bounds[0][0]).max(bounds[1][1] - bounds[0][1]);
    for (panel, show_all) in [(0u32, true), (1, false)] {
        for (p, &fate) in cloud.positions.iter().zip(&prepared.fate) {
            if !show_all && fate != Fate::Part {
                continue;
            }
            let px = ((p[0] - bounds[0][0]) * scale) as i64 + 10 + i64::from(panel * PANEL);
            let py = ((p[1] - bounds[0][1]) * scale) as i64 + 10;
            // Nearer points brighter, so the shape reads without lighting.
            let shade = 1.0 - 0.5 * (p[2] - bounds[0][2]) / (bounds[1][2] - bounds[0][2]).max(1e-6);
            let colour = fate_colour(fate).map(|c| (c as f32 * shade) as u8);
            // Strays and other objects are few: draw them larger so they can be seen.
            let radius = if matches!(fate, Fate::Stray | Fate::OtherCluster) {
                3
            } else {
                1
            };
            for (dx, dy) in
                (-radius..=radius).flat_map(|dx| (-radius..=radius).map(move |dy| (dx, dy)))
            {
                let (x, y) = (px + dx, py + dy);
                if x < i64::from(panel * PANEL)
                    || x >= i64::from((panel + 1) * PANEL)
                    || y < 0
                    || y >= i64::from(PANEL)
                {
                    continue;
                }
                let at = (y as u32 * 2 * PANEL + x as u32) as usize;
                if p[2] < depth[at] || radius > 1 {
                    depth[at] = p[2];
                    image[at] = colour;
                }
            }
        }
    }
    let file = std::fs::File::create(&out)?;
    let mut encoder = png::Encoder::new(std::io::BufWriter::new(file), 2 * PANEL, PANEL);
    encoder.set_color(png::ColorType::Rgb);
    encoder.set_depth(png::BitDepth::Eight);
    encoder
        .write_header()?
        .write_image_data(image.as_flattened())?;
    println!(
        "{part}, seed {seed}: {} raw points, {} kept",
        cloud.len(),
        prepared.kept.len()
    );
    print!("{}", prepared.report);
    println!("wrote {}", out.display());
    Ok(())
}
