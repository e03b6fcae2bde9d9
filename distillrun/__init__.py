"""distillrun: distil a slow diffusion teacher into a few-step student, measuring every stage."""

__version__ = "0.1.0"
