"""pliant's engine: elastic brushes from regularized Kelvinlets (de Goes & James 2017)."""
