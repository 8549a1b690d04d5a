from kablate.launch import main

main()
