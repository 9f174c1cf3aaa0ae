"""The consolidation model: its filter and gradient, the fit, the estimate, live updates and plain measures."""
