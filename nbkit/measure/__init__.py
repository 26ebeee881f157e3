"""Pure functions: tensors in, numbers out. No hooks, no files, no state."""
