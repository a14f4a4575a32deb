"""lotgate's package: pure assay computation plus thin adapters (files, store, PDFs, signing)."""

__version__ = "0.1.0"
