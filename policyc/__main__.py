from policyc.cli import main

main()
