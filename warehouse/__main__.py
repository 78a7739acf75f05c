from .front.cli import main

main()
