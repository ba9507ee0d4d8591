"""Methods: the ways of turning a checkpoint into a classifier, behind one registry.

| module | one idea |
|---|---|
| `registry` | the `Method` protocol, `METHODS` and `register_method` |
| `head` | backbone + pooling + a fresh seeded head (`head`) |
| `pooling` | the pooling registry (`first`, `last`, `mean`), the head and the head model |
| `head_export` | a trained head saved for `predict`, and reloaded |
| `next_token` | label words as next tokens with a masked loss (`next_token`) |
| `prompt` | no training: zero- or few-shot scoring, contextual calibration (`prompt`) |
| `rank_scoring` | each label's log-probability after a prompt, the prompt's cache reused |
| `templates` | safe prompt templates, label words tokenised in context |
| `batches` | tokenising, padding and the batch width rule, scoring passes, parameter counts |
| `adapters` | low-rank adapters (LoRA), one setup for every method |
"""
