from lapsewise.app.cli import main

main()
