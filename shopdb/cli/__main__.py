from shopdb.cli.main import main

main()
