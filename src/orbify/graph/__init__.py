"""The model as a torch.fx graph: tracing, the op rule table, the conversion plan and safe input sizes."""
