//! A verdict: the predicted part type, its calibrated confidence, and whether it is sure or needs a person.
