"""Mining: pose search, pose-aware clustering, symmetry, choice of K, the prototype library."""
