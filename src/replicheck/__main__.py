from replicheck.cli import main

main()
