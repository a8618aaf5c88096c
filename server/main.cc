// mdpserve: entry point. Hands the command line to the CLI front end.
#include <iostream>

#include "server/cli.h"

int main(int argc, char** argv) { return mdp::server::RunCli(argc, argv, std::cout, std::cerr); }
