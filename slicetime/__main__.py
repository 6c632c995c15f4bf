from slicetime.interfaces.entry import main

if __name__ == "__main__":
    main()
