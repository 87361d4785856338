//! The clean-up recipe: from a raw scan in mm to a prepared cloud that keeps the part's true size.
