//! Buffers kept between passes. A training step of `full` at batch 32 makes a few hundred MB
//! of activations and gradients; fresh from the allocator these are fresh pages, and the
//! kernel's page faults and zeroing of them cost as much as a sizeable part of the arithmetic.
//! So the fast path takes its large buffers from a per-thread list of spare ones, and a
//! [`Spare`] buffer goes back to that list when dropped (on whichever thread drops it).
//!
//! The list holds at most [`KEPT`] buffers, so it stays the size of one pass's working set:
//! the memory a pass needs at its peak anyway.

use std::cell::RefCell;
use std::ops::{Deref, DerefMut};

/// Most spare buffers of one element type a thread keeps.
const KEPT: usize = 48;

/// A buffer that goes back to its thread's spare list when dropped.
#[derive(Debug, Default)]
pub(crate) struct Spare<T: Element>(Vec<T>);

/// The element types buffers are kept for, each with its own list.
pub(crate) trait Element: Copy + Default + 'static {
    /// Runs `f` on this thread's list; `None` once the thread is ending and its list is gone.
    fn with_list<R>(f: impl FnOnce(&mut Vec<Vec<Self>>) -> R) -> Option<R>;
}

macro_rules! element {
    ($t:ty, $list:ident) => {
        thread_local! {
            static $list: RefCell<Vec<Vec<$t>>> = const { RefCell::new(Vec::new()) };
        }
        impl Element for $t {
            fn with_list<R>(f: impl FnOnce(&mut Vec<Vec<Self>>) -> R) -> Option<R> {
                $list.try_with(|cell| f(&mut cell.borrow_mut())).ok()
            }
        }
    };
}

element!(f32, SPARE_F32);
element!(u32, SPARE_U32);
element!(u8, SPARE_U8);

impl<T: Element> Spare<T> {
    /// `len` values, whatever a previous pass left in them: for buffers that are written
    /// whole before they are read.
    pub fn reused(len: usize) -> Spare<T> {
        let taken = T::with_list(|list| {
            // The smallest that is large enough.
            let best = list
                .iter()
                .enumerate()
                .filter(|(_, v)| v.capacity() >= len)
                .min_by_key(|(_, v)| v.capacity())
                .map(|(i, _)| i);
            best.map(|i| list.swap_remove(i))
        })
        .flatten();
        let mut v = taken.unwrap_or_default();
        if v.len() > len {
            v.truncate(len);
        } else {
            v.resize(len, T::default());
        }
        Spare(v)
    }
}

impl<T: Element> Drop for Spare<T> {
    fn drop(&mut self) {
        let v = std::mem::take(&mut self.0);
        if v.capacity() == 0 {
            return;
        }
        T::with_list(|list| {
            list.push(v);
            if list.len() > KEPT {
                // Drop the smallest: the large ones are what saves time.
                if let Some((i, _)) = list.iter().enumerate().min_by_key(|(_, v)| v.capacity()) {
                    list.swap_remove(i);
                }
            }
        });
    }
}

impl<T: Element> Deref for Spare<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        &self.0
    }
}

impl<T: Element> DerefMut for Spare<T> {
    fn deref_mut(&mut self) -> &mut [T] {
        &mut self.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_dropped_buffer_is_taken_again() {
        let mut a = Spare::<f32>::reused(1000);
        a.fill(3.0);
        let at = a.as_ptr();
        drop(a);
        let b = Spare::<f32>::reused(900);
        assert_eq!(b.as_ptr(), at, "the same memory again");
        assert_eq!(b.len(), 900);
        let c = Spare::<f32>::reused(2000);
        assert_eq!(c.len(), 2000);
    }
}
