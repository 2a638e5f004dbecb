"""Pure kernels: arrays (or CSR triplets) in, arrays out. No files, config or logging here."""
