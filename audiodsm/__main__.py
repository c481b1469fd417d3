from audiodsm.cli import main

main()
