// credence: the one command-line program. Subcommands live in cli/*_command.cpp.
#include <iostream>

int main() {
    std::cerr << "credence: no subcommands yet\n";
    return 2;
}
