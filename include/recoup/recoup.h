/* recoup: recover the accuracy of a compressed ONNX model by distilling it
 * against its dense original, on CPU.
 *
 * The library reads an ONNX model into an opaque rc_model, runs and trains it
 * with its own kernels, keeps pruning masks and integer grids exact, and
 * writes the result back as ONNX with everything else in the file unchanged.
 *
 *   recoup/model.h     load, inspect (inputs and outputs, op counts,
 *                      parameters and MACs, weights with sparsity and N:M,
 *                      quantization grids) and save models
 *   recoup/data.h      read .npy, .npz, IDX and TensorProto files; turn them
 *                      into float inputs and checked labels; dataset views
 *   recoup/pairing.h   which teacher tensors feature terms match with which
 *                      student tensors
 *   recoup/eval.h      run a model over a dataset: accuracy, agreement and
 *                      KL against a reference model, all outputs
 *   recoup/distill.h   fine-tune a student against its teacher: settings with
 *                      defaults, a progress callback, a cancellation flag;
 *                      the loss terms; the run's summary in detail
 *   recoup/outputs.h   losses per model output (maps, detector heads,
 *                      regressions), their targets and dense labels
 *   recoup/synthesize.h  inputs made from a teacher alone (no data at hand)
 *   recoup/rules.h     what a weight's zeros mean, integer ranges of grids
 *   recoup/parallel.h  the processes sharing a run (MPI ranks)
 *   recoup/prune.h     magnitude, N:M and channel pruning of a dense model
 *   recoup/quantize.h  post-training quantization into a QDQ model
 *   recoup/parallel.h  the ranks of an MPI job (or one process): joining,
 *                      rank and host, messages between ranks
 *   recoup/status.h    rc_status codes and rc_err, the message of a failure
 *   recoup/util.h      escaping names for printing, refusing outputs that are
 *                      inputs, atomic file writes, figures to 4 digits
 *
 * Conventions: functions are named rc_<module>_<verb>; every function that
 * can fail returns an rc_status and fills an rc_err whose message names the
 * file, node or field at fault. The library never prints and never exits.
 * Settings structs get their defaults from one rc_<module>_settings_init (or
 * _opts_init / _config_init) call; what a function allocates is released by
 * the matching _free. Handles are not shared between threads while in use.
 *
 * A short example (error checks shortened; tests/api_example.c is the full
 * program, built against the installed library with pkg-config):
 *
 *   rc_err e = {0};
 *   rc_model *teacher, *student;
 *   rc_model_load(&teacher, "garment_dense.onnx", NULL, &e);
 *   rc_model_load(&student, "garment_pruned90.onnx", NULL, &e);
 *
 *   // images: a float (N, 1, 28, 28) rc_array made with rc_array_read,
 *   // rc_data_fit and rc_data_to_float_array (recoup/data.h)
 *   rc_distill_data data = {.inputs = &images.t, .n_inputs = 1, .val_split = 0.1};
 *   rc_distill_settings s;
 *   rc_distill_settings_init(&s);
 *   s.steps = 400;
 *   rc_distill_summary sum;
 *   if (rc_distill_train(&sum, teacher, student, &data, &s, &e) != RC_OK ||
 *       rc_distill_save(&sum, student, "garment_recovered.onnx", &data, &e) != RC_OK)
 *     fprintf(stderr, "%s\n", e.msg);
 *   printf("agreement %.2f%% -> %.2f%%\n", 100 * sum.before.agreement, 100 * sum.after.agreement);
 *   rc_distill_summary_free(&sum);
 *   rc_model_free(student);
 *   rc_model_free(teacher);
 *
 * Build: cc prog.c $(pkg-config --cflags --libs recoup)
 */
#ifndef RECOUP_RECOUP_H
#define RECOUP_RECOUP_H

#include "recoup/data.h"
#include "recoup/distill.h"
#include "recoup/eval.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/outputs.h"
#include "recoup/pairing.h"
#include "recoup/parallel.h"
#include "recoup/prune.h"
#include "recoup/quantize.h"
#include "recoup/rules.h"
#include "recoup/status.h"
#include "recoup/synthesize.h"
#include "recoup/tensor.h"
#include "recoup/util.h"

#endif
