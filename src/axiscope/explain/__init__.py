"""What the axes mean: sample annotations, supplementary elements and per-axis explanations."""
