from lapsewise.cli import main

main()
