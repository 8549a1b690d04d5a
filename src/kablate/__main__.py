from kablate.cli import main

main()
