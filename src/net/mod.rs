//! The networks: layers with hand-written forward and backward passes, presets, model file.
