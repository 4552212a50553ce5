/* recoup: recover the accuracy a compressed model lost, by distilling it from
 * its dense original on CPU. This file only dispatches to the commands. */
#define _DEFAULT_SOURCE /* setenv */
#include <getopt.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli/cli.h"
#include "recoup/parallel.h"

static const rc_command commands[] = {
    {"inspect", "show a model's inputs, outputs, ops, sparsity and quantization grids", rc_cmd_inspect},
    {"eval", "run a model over data: accuracy, agreement with another model, outputs", rc_cmd_eval},
    {"distill", "fine-tune a compressed model against its dense original, masks kept", rc_cmd_distill},
    {"batch", "run a manifest's zoo of distill jobs: parallel, resumable, sharded, with reports", rc_cmd_batch},
    {"prune", "make a sparse or narrower student from a dense model", rc_cmd_prune},
    {"quantize", "quantize a dense model to integer grids (QDQ) from calibration samples", rc_cmd_quantize},
    {"synthesize", "make input samples from a teacher's BatchNormalization statistics (no data)", rc_cmd_synthesize},
};

#define N_COMMANDS ((int)(sizeof commands / sizeof commands[0]))

static void print_help(void) {
  printf(
      "Usage: recoup COMMAND [OPTIONS]\n"
      "\n"
      "Recover the accuracy a pruned or quantized ONNX model lost, by distilling it\n"
      "from its dense original on CPU, keeping its masks and integer grids.\n"
      "\n"
      "Commands:\n");
  for (int i = 0; i < N_COMMANDS; i++) printf("  %-10s %s\n", commands[i].name, commands[i].summary);
  printf(
      "\n"
      "Options:\n"
      "  -h, --help     show this help\n"
      "  -V, --version  show the version\n"
      "\n"
      "Run 'recoup COMMAND --help' for a command's options.\n"
      "Exit status: 0 success, 1 failure, 2 usage error.\n");
}

/* OpenMP threads that finish a parallel region spin before they sleep. On a
 * shared build server, or with several recoup jobs side by side, a spinning
 * thread takes the core another thread needs and a step can cost ten times
 * its CPU time. The wait policy is read once when the OpenMP runtime loads,
 * so when the user has not chosen one, recoup sets it and starts itself again. */
static void wait_passively(char **argv) {
  if (getenv("OMP_WAIT_POLICY")) return;
  if (setenv("OMP_WAIT_POLICY", "PASSIVE", 1) != 0) return;
  execv("/proc/self/exe", argv);
  /* If re-executing fails, carry on with the default policy. */
}

/* Written once, before any command runs; MPI itself is one per process. */
static rc_dist *the_dist;
static int agreed_exit;

rc_dist *cli_dist(void) { return the_dist; }
void cli_dist_agreed_exit(void) { agreed_exit = 1; }

/* Under mpirun every rank runs the command; rank 0 alone prints results,
 * the others keep stderr for their errors. */
static int join_ranks(int *argc, char ***argv) {
  rc_err e = {0};
  if (rc_dist_start(&the_dist, argc, argv, &e) != RC_OK) return cli_fail(&e);
  if (rc_dist_rank(the_dist) != 0 && !freopen("/dev/null", "w", stdout)) return RC_EXIT_FAIL;
  return RC_EXIT_OK;
}

/* A command that failed on one rank of several stops them all: the others
 * may wait in a collective call for it. cli_fail has named rank and host. */
static int leave_ranks(int rc) {
  if (rc != RC_EXIT_OK && !agreed_exit) {
    fflush(stdout);
    fflush(stderr);
    rc_dist_abort(the_dist, rc);
  }
  rc_dist_end(the_dist);
  return rc;
}

static int dispatch(int argc, char **argv) {
  const char *cmd = argv[1];
  for (int i = 0; i < N_COMMANDS; i++)
    if (!strcmp(cmd, commands[i].name)) return commands[i].run(argc - 1, argv + 1);
  return cli_usage_error(NULL, "unknown command '%s'", cmd);
}

int main(int argc, char **argv) {
  wait_passively(argv);
  /* A write past a file-size limit must fail with EFBIG, not kill us. */
  signal(SIGXFSZ, SIG_IGN);
  /* getopt stays quiet: each command reports a bad option in one line. */
  opterr = 0;
  if (argc < 2) {
    print_help();
    return RC_EXIT_USAGE;
  }
  const char *cmd = argv[1];
  if (!strcmp(cmd, "-h") || !strcmp(cmd, "--help") || !strcmp(cmd, "help")) {
    print_help();
    return RC_EXIT_OK;
  }
  if (!strcmp(cmd, "-V") || !strcmp(cmd, "--version")) {
    printf("recoup %s\n", RECOUP_VERSION);
    return RC_EXIT_OK;
  }
  int rc = join_ranks(&argc, &argv);
  if (rc != RC_EXIT_OK) return rc;
  return leave_ranks(dispatch(argc, argv));
}
