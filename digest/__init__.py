"""digest: nightly data-quality digests for routine health-facility reports."""

__version__ = "0.1.0"
