"""Limner compression stage: networks, losses, training, distillation, pruning,
quantization and export. Needs torch (the `compress` extra)."""
