//! Named tensors in flat stores: every trainable parameter of a network lives in one
//! `Vec<f32>` (and its gradient in a second one of the same layout), every batch-norm
//! running statistic in a third. Layers hold [`Slot`]s into them. The optimisers then work on
//! one flat slice, and the model file walks the names.

use crate::rng::Rng;

/// Where one tensor lives in a flat store.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) struct Slot {
    pub offset: usize,
    pub len: usize,
}

impl Slot {
    pub fn of<'a>(&self, store: &'a [f32]) -> &'a [f32] {
        &store[self.offset..self.offset + self.len]
    }

    pub fn of_mut<'a>(&self, store: &'a mut [f32]) -> &'a mut [f32] {
        &mut store[self.offset..self.offset + self.len]
    }
}

/// A named tensor of a store: its name in the model file, its shape, its place.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) struct TensorEntry {
    pub name: String,
    pub shape: Vec<usize>,
    pub slot: Slot,
}

/// Named tensors back to back in one buffer.
#[derive(Clone, Debug, Default)]
pub(crate) struct Store {
    pub values: Vec<f32>,
    pub entries: Vec<TensorEntry>,
}

impl Store {
    fn add(&mut self, name: String, shape: &[usize], values: impl Iterator<Item = f32>) -> Slot {
        assert!(
            self.entries.iter().all(|e| e.name != name),
            "tensor {name} registered twice"
        );
        let offset = self.values.len();
        self.values.extend(values);
        let len = self.values.len() - offset;
        assert_eq!(len, shape.iter().product::<usize>(), "tensor {name}");
        let slot = Slot { offset, len };
        self.entries.push(TensorEntry {
            name,
            shape: shape.to_vec(),
            slot,
        });
        slot
    }
}

/// How a parameter starts.
#[derive(Clone, Copy, Debug)]
pub(crate) enum Init {
    /// Uniform in `[-bound, bound)`.
    Uniform(f32),
    Constant(f32),
}

/// Collects the tensors of a network while its layers are built, drawing initial values
/// from one seeded generator in the order the layers ask for them.
pub(crate) struct Builder {
    pub params: Store,
    pub running: Store,
    rng: Rng,
}

impl Builder {
    pub fn new(seed: u64) -> Builder {
        Builder {
            params: Store::default(),
            running: Store::default(),
            rng: Rng::new(seed),
        }
    }

    pub fn param(&mut self, name: String, shape: &[usize], init: Init) -> Slot {
        let len = shape.iter().product();
        let rng = &mut self.rng;
        let values = (0..len).map(|_| match init {
            Init::Uniform(bound) => rng.range(-bound as f64, bound as f64) as f32,
            Init::Constant(v) => v,
        });
        self.params.add(name, shape, values)
    }

    pub fn running(&mut self, name: String, shape: &[usize], value: f32) -> Slot {
        let len = shape.iter().product();
        self.running
            .add(name, shape, std::iter::repeat_n(value, len))
    }
}

/// What a forward pass reads, and in training updates.
pub(crate) struct Pass<'a> {
    pub params: &'a [f32],
    pub running: Running<'a>,
}

/// Batch normalisation's mode: in training it normalises with the batch's statistics and
/// updates the running ones; otherwise it uses the running ones.
pub(crate) enum Running<'a> {
    Update(&'a mut [f32]),
    Use(&'a [f32]),
}
