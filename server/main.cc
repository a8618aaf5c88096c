// mdpserve: entry point. Hands the command line to the CLI front end, after making sure the
// OpenMP runtime starts with the spin count this service wants (thread_setup.h).
#include <iostream>

#include "server/cli.h"
#include "server/thread_setup.h"

int main(int argc, char** argv) {
  mdp::server::ExecAgainWithOpenMpSpinCount(argv);
  return mdp::server::RunCli(argc, argv, std::cout, std::cerr);
}
