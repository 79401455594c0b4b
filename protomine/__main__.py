"""``python -m protomine``: the same command line as the ``protomine`` console script."""
from .cli import main

main()
