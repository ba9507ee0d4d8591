"""Fine-tune and compare small transformer text classifiers on a CPU."""
