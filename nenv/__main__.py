from nenv.cli import main

main()
