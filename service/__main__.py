"""`python -m service` is the `lytestream` command."""

from service.cli import main

main()
