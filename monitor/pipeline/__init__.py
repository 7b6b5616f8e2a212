"""The only wiring between the store and the computation."""
