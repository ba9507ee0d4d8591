"""Training: the loop and what it needs.

| module | one idea |
|---|---|
| `loop` | the accelerate training loop: optimiser, schedule, evaluation, early stopping, log |
| `batching` | batch order: random, or length-grouped inside shuffled pools that keep the class mix |
| `checkpoints` | resumable checkpoints, Ctrl-C handling |
| `processes` | several processes under accelerate's launcher: barriers, gradient averaging, sharded scoring |
| `memory` | resident memory now and at peak, per run |
"""
