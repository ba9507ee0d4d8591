"""tiltyard: fine-tune small pretrained transformers as text classifiers on a CPU and compare the ways of doing it.

The command line is `tiltyard` (or `python -m harness`); the subpackages are listed in DEVELOPERS.md.
"""
