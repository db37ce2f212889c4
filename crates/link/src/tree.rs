//! Completion times of transfer slots in a tournament tree.

use crate::TransferId;

/// Completion times of flow slots in a tournament tree: the minimum is at the
/// root, an update walks one leaf-to-root path, and the slots due by a time
/// are found by descending only into subtrees whose minimum is due.
#[derive(Clone, Debug, Default)]
pub(crate) struct MinTree {
    /// `tree[1]` is the root; leaves start at `tree[size]`.
    tree: Vec<u64>,
    size: usize,
}

impl MinTree {
    fn ensure(&mut self, slots: usize) {
        if slots <= self.size {
            return;
        }
        let mut size = self.size.max(16);
        while size < slots {
            size *= 2;
        }
        let mut tree = vec![u64::MAX; 2 * size];
        for i in 0..self.size {
            tree[size + i] = self.tree[self.size + i];
        }
        for i in (1..size).rev() {
            tree[i] = tree[2 * i].min(tree[2 * i + 1]);
        }
        self.tree = tree;
        self.size = size;
    }

    pub(crate) fn set(&mut self, slot: usize, value: u64) {
        self.ensure(slot + 1);
        let mut i = self.size + slot;
        self.tree[i] = value;
        while i > 1 {
            i /= 2;
            let m = self.tree[2 * i].min(self.tree[2 * i + 1]);
            if self.tree[i] == m {
                break;
            }
            self.tree[i] = m;
        }
    }

    pub(crate) fn min(&self) -> Option<u64> {
        self.tree.get(1).copied().filter(|&m| m != u64::MAX)
    }

    /// Appends the slots whose value is at most `t`, in slot order.
    pub(crate) fn due(&self, t: u64, out: &mut Vec<TransferId>) {
        if self.size > 0 {
            self.due_below(1, t, out);
        }
    }

    fn due_below(&self, i: usize, t: u64, out: &mut Vec<TransferId>) {
        if self.tree[i] > t {
            return;
        }
        if i >= self.size {
            out.push(TransferId((i - self.size) as u32));
        } else {
            self.due_below(2 * i, t, out);
            self.due_below(2 * i + 1, t, out);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn minimum_and_due_slots() {
        let mut t = MinTree::default();
        assert_eq!(t.min(), None);
        t.set(3, 50);
        t.set(20, 10);
        t.set(7, 30);
        assert_eq!(t.min(), Some(10));
        let mut due = Vec::new();
        t.due(30, &mut due);
        assert_eq!(due, vec![TransferId(7), TransferId(20)], "slots due by 30, in slot order");
        t.set(20, u64::MAX);
        assert_eq!(t.min(), Some(30));
    }
}
