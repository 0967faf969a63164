"""HTTP layer: FastAPI app factory, routers, request/response models, problem+json errors."""
