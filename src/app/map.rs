//! The Map tab: every scan of the parts bin as a dot in 2D (the model's pooled features
//! brought down to two axes), coloured by its label. A dot whose nearest neighbours carry
//! another label is ringed: a likely wrong label. Clicking a dot opens its scan in Inspect.

use eframe::egui;
use std::path::PathBuf;
use std::sync::Arc;

use egui_plot::{HoverPosition, Legend, MarkerShape, Plot, PlotPoint, PlotTransform, Points};

use super::backend;
use super::inspect::file_name;
use super::worker::{poll_slot, JobEvent, Reporter, Worker};
use super::{palette, Action, Shared};

/// One scan on the map.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct MapDot {
    pub(crate) path: PathBuf,
    /// Index into [`MapData::part_types`] of its label.
    pub(crate) label: usize,
    /// Position on the map's two axes (unitless).
    pub(crate) xy: [f32; 2],
    /// Its nearest neighbours mostly carry another label.
    pub(crate) suspicious: bool,
}

/// The whole map.
#[derive(Clone, Debug, Default, PartialEq)]
pub(crate) struct MapData {
    pub(crate) part_types: Vec<String>,
    pub(crate) dots: Vec<MapDot>,
}

/// The series of ringed dots.
const RINGED: &str = "likely mislabelled";
/// A click lands on a dot when it is within this many screen points of it.
const CLICK_RADIUS: f32 = 8.0;

#[derive(Default)]
pub(crate) struct MapTab {
    data: Option<MapData>,
    worker: Option<Worker<JobEvent<MapData>>>,
    fraction: f32,
    error: Option<String>,
}

impl MapTab {
    pub(crate) fn busy(&self) -> Option<String> {
        self.worker
            .as_ref()
            .map(|_| format!("making the map ({:.0} %)", 100.0 * self.fraction))
    }

    pub(crate) fn poll(&mut self) {
        let Self {
            data,
            worker,
            fraction,
            error,
        } = self;
        let crashed = poll_slot(worker, |event| match event {
            JobEvent::Fraction(f) => *fraction = f,
            JobEvent::Done(Ok(d)) => *data = Some(d),
            JobEvent::Done(Err(e)) => *error = Some(e.to_string()),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
    }

    pub(crate) fn ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        let Self {
            data,
            worker,
            fraction,
            error,
        } = self;
        ui.horizontal(|ui| {
            ui.heading("Map");
            let can = worker.is_none() && shared.bin.is_some() && shared.model.is_some();
            let label = if data.is_some() {
                "Make the map again"
            } else {
                "Make the map"
            };
            if ui
                .add_enabled(can, egui::Button::new(label))
                .on_disabled_hover_text("Needs a parts bin and a model.")
                .clicked()
            {
                if let (Some(bin), Some(model)) = (shared.bin, shared.model) {
                    let bin = bin.to_path_buf();
                    let model = Arc::clone(model);
                    let job = move |r: &Reporter<JobEvent<MapData>>| {
                        let result = backend::map_bin(&bin, &model, r);
                        r.send(JobEvent::Done(result));
                    };
                    *error = None;
                    match Worker::spawn(ui.ctx(), "map", job) {
                        Ok(w) => *worker = Some(w),
                        Err(e) => *error = Some(format!("could not start: {e}")),
                    }
                }
            }
            if worker.is_some() {
                ui.add(
                    egui::ProgressBar::new(*fraction)
                        .show_percentage()
                        .desired_width(200.0),
                );
            }
        });
        ui.weak(
            "Each dot is a scan of the parts bin, placed by what the model learned of it. \
             Ringed dots sit among scans of another type: their label may be wrong. Click a dot to inspect its scan.",
        );
        if let Some(e) = error {
            ui.colored_label(palette::error_colour(), e.as_str());
        }
        let Some(data) = data else {
            return;
        };
        if let Some(path) = scatter(ui, data) {
            shared.actions.push(Action::OpenScan(path));
        }
    }
}

/// The scatter plot; returns the scan of a clicked dot.
fn scatter(ui: &mut egui::Ui, data: &MapData) -> Option<PathBuf> {
    // Which dot each plotted point is: per type series, then the ringed series.
    let mut series: Vec<Vec<usize>> = vec![Vec::new(); data.part_types.len()];
    for (i, d) in data.dots.iter().enumerate() {
        if let Some(s) = series.get_mut(d.label) {
            s.push(i);
        }
    }
    let ringed: Vec<usize> = (0..data.dots.len())
        .filter(|&i| data.dots[i].suspicious)
        .collect();
    let xy = |i: &usize| {
        [
            f64::from(data.dots[*i].xy[0]),
            f64::from(data.dots[*i].xy[1]),
        ]
    };
    let ring = ui.visuals().strong_text_color();
    let response = Plot::new("feature map")
        .legend(Legend::default().follow_insertion_order(true))
        .data_aspect(1.0)
        .show_axes(false)
        .label_formatter(|pos| match pos {
            HoverPosition::NearDataPoint {
                plot_name, index, ..
            } => {
                let list = if *plot_name == RINGED {
                    &ringed
                } else {
                    series.get(data.part_types.iter().position(|n| n == plot_name)?)?
                };
                let dot = &data.dots[*list.get(*index)?];
                let label = data.part_types.get(dot.label).map_or("?", String::as_str);
                Some(format!("{}\nlabel: {label}", file_name(&dot.path)))
            }
            HoverPosition::Elsewhere { .. } => None,
        })
        .show(ui, |plot| {
            for (t, name) in data.part_types.iter().enumerate() {
                let points: Vec<[f64; 2]> = series[t].iter().map(xy).collect();
                plot.points(
                    Points::new(name.as_str(), points)
                        .radius(4.0)
                        .color(palette::type_colour(t, data.part_types.len()))
                        .shape(MarkerShape::Circle)
                        .filled(true),
                );
            }
            if !ringed.is_empty() {
                plot.points(
                    Points::new(RINGED, ringed.iter().map(xy).collect::<Vec<_>>())
                        .radius(8.0)
                        .color(ring)
                        .shape(MarkerShape::Circle)
                        .filled(false),
                );
            }
        });
    if !response.response.clicked() {
        return None;
    }
    let pointer = response.response.interact_pointer_pos()?;
    dot_at(data, &response.transform, pointer).map(|d| d.path.clone())
}

/// The dot nearest to screen position `pointer`, if within [`CLICK_RADIUS`] of it.
fn dot_at<'a>(
    data: &'a MapData,
    transform: &PlotTransform,
    pointer: egui::Pos2,
) -> Option<&'a MapDot> {
    let (dot, distance) = data
        .dots
        .iter()
        .map(|d| {
            let at = transform.position_from_point(&PlotPoint::new(d.xy[0], d.xy[1]));
            (d, at.distance(pointer))
        })
        .min_by(|a, b| a.1.total_cmp(&b.1))?;
    (distance <= CLICK_RADIUS).then_some(dot)
}

#[cfg(test)]
impl MapTab {
    pub(crate) fn set_data(&mut self, data: MapData) {
        self.data = Some(data);
    }
    pub(crate) fn has_data(&self) -> bool {
        self.data.is_some()
    }
    pub(crate) fn data(&self) -> Option<&MapData> {
        self.data.as_ref()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use egui_plot::PlotBounds;

    #[test]
    fn a_click_picks_the_nearest_dot_within_reach() {
        let dot = |name: &str, xy| MapDot {
            path: name.into(),
            label: 0,
            xy,
            suspicious: false,
        };
        let data = MapData {
            part_types: vec!["washer".into()],
            dots: vec![dot("a.ply", [0.0, 0.0]), dot("b.ply", [10.0, 10.0])],
        };
        // 100 x 100 points showing 0..10 on both axes: 10 points per unit, y up.
        let rect = egui::Rect::from_min_size(egui::pos2(0.0, 0.0), egui::vec2(100.0, 100.0));
        let transform = PlotTransform::new(
            rect,
            PlotBounds::from_min_max([0.0, 0.0], [10.0, 10.0]),
            false,
        );
        let at = |x, y| dot_at(&data, &transform, egui::pos2(x, y)).map(|d| d.path.clone());
        assert_eq!(at(3.0, 97.0), Some("a.ply".into()));
        assert_eq!(at(99.0, 2.0), Some("b.ply".into()));
        assert_eq!(at(50.0, 50.0), None, "too far from both");
    }
}
