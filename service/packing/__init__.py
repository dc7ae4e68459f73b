"""Token-budget packing of ranked chunks into numbered passages."""
