"""Access control: SMART scopes, bearer tokens (minted here or JWTs from the hospital's server), FastAPI
dependencies that check them."""
