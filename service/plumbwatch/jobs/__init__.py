"""The tick: take a model's lease, evaluate it, and (later) alerts and deliveries."""
