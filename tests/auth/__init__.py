"""Access control: scopes, tokens, JWT verification, FastAPI dependencies, the token CLI."""
