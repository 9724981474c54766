//! Data-driven models (`shapley`, `markov`), fitted from closed paths.
