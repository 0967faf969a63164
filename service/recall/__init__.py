"""Use-cases between the HTTP layer and the engine/storage: store, compile, recall, reconcile."""
