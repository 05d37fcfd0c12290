"""Cost model: analytic parameters, FLOPs per token and inference state (analytic), activation memory (memory)."""
