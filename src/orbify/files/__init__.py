"""Files in and out: model sources, the converted-file format, and export to plain PyTorch formats."""
