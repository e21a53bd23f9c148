/* The C API from C, on the host: tests/c_api.rs builds this against the host build of the static
 * library, runs it on a blob and a table of readings it wrote, and compares every line with the
 * Rust core's own results on the same readings.
 *
 *   host_test BLOB READINGS      READINGS: count (u32 LE), then count * N floats (f32 LE)
 *
 * Output: one line per argument check ("check NAME ok", or "check NAME FAILED ..." and exit 1),
 * then for each reading
 *   r INDEX st=STATUS d2=BITS above=A feature=F alarm=A fault=F events=KIND:CAUSE:FEATURE:INDEX,...
 *     ex=STATUS c=BITS,BITS,...
 * with d² and the contributions as the hex bits of the float, and at the end "end readings=COUNT".
 */
#define ELLIPSOID_N 5
#include "ellipsoid.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int failures;

static void check(const char *name, long got, long want) {
  if (got == want) {
    printf("check %s ok\n", name);
  } else {
    printf("check %s FAILED: got %ld, want %ld\n", name, got, want);
    failures++;
  }
}

static uint32_t bits(float f) {
  uint32_t u;
  memcpy(&u, &f, sizeof u);
  return u;
}

static unsigned char *slurp(const char *path, size_t *len) {
  FILE *f = fopen(path, "rb");
  if (!f) {
    fprintf(stderr, "host_test: cannot open %s\n", path);
    exit(2);
  }
  fseek(f, 0, SEEK_END);
  long n = ftell(f);
  fseek(f, 0, SEEK_SET);
  unsigned char *buf = malloc((size_t)n + 8);
  if (!buf || fread(buf, 1, (size_t)n, f) != (size_t)n) {
    fprintf(stderr, "host_test: cannot read %s\n", path);
    exit(2);
  }
  fclose(f);
  *len = (size_t)n;
  return buf;
}

static void print_step(const ellipsoid_step_t *step) {
  printf(" alarm=%u fault=%u events=", step->alarm, step->fault);
  if (step->n_events == 0) printf("-");
  for (unsigned k = 0; k < step->n_events; k++) {
    const ellipsoid_event_t *e = &step->events[k];
    printf("%s%d:%d:%u:%u", k ? "," : "", (int)e->kind, (int)e->cause, e->feature, e->index);
  }
}

/* Every bad argument is refused with its own code, and nothing is ever scored "normal" by it. */
static void argument_checks(const unsigned char *blob, size_t blob_len) {
  static ellipsoid_model_storage_t storage, spare;
  static ellipsoid_alarm_t alarm;
  const ellipsoid_model *model = (const ellipsoid_model *)&storage;
  float x[ELLIPSOID_N] = {0};
  float c[ELLIPSOID_N];
  x[1] = 1.0f; /* feature 1 is log-transformed: its reading must be positive */
  ellipsoid_score_t s;
  ellipsoid_step_t step;

  check("features", (long)ellipsoid_features(), ELLIPSOID_N);
  check("storage-fits", ellipsoid_model_bytes() <= sizeof storage, 1);
  /* Storage that was never decoded (zeroed, as .bss is) is refused, and the score says so. */
  check("not-decoded", ellipsoid_score(model, x, ELLIPSOID_N, &s), ELLIPSOID_ERR_NOT_DECODED);
  check("not-decoded-d2-nan", s.d2 != s.d2, 1);
  check("not-decoded-status", s.status, ELLIPSOID_ERR_NOT_DECODED);
  check("decode-null-blob", ellipsoid_decode(NULL, blob_len, &storage, sizeof storage, &model),
        ELLIPSOID_ERR_NULL);
  check("decode-null-model-out", ellipsoid_decode(blob, blob_len, &storage, sizeof storage, NULL),
        ELLIPSOID_ERR_NULL);
  check("decode-small-storage",
        ellipsoid_decode(blob, blob_len, &storage, ellipsoid_model_bytes() - 1, &model),
        ELLIPSOID_ERR_STORAGE_SIZE);
  check("decode-misaligned",
        ellipsoid_decode(blob, blob_len, storage.bytes + 4, sizeof storage - 8, &model),
        ELLIPSOID_ERR_ALIGNMENT);
  check("decode-short", ellipsoid_decode(blob, 9, &storage, sizeof storage, &model),
        ELLIPSOID_ERR_BLOB_TOO_SHORT);
  check("decode-cut", ellipsoid_decode(blob, blob_len - 1, &storage, sizeof storage, &model),
        ELLIPSOID_ERR_BLOB_TOO_SHORT);
  check("failed-decode-clears-handle", model == NULL, 1);
  {
    unsigned char bad[4096];
    memcpy(bad, blob, blob_len);
    bad[blob_len - 1] ^= 1;
    check("decode-crc", ellipsoid_decode(bad, blob_len, &storage, sizeof storage, &model),
          ELLIPSOID_ERR_BLOB_CRC);
    memcpy(bad, blob, blob_len);
    bad[0] = 0xFF;
    check("decode-magic", ellipsoid_decode(bad, blob_len, &storage, sizeof storage, &model),
          ELLIPSOID_ERR_BLOB_MAGIC);
    memcpy(bad, blob, blob_len);
    bad[5] = ELLIPSOID_N + 1;
    check("decode-dimension", ellipsoid_decode(bad, blob_len, &storage, sizeof storage, &model),
          ELLIPSOID_ERR_BLOB_DIMENSION);
  }
  /* A slot longer than the blob is fine: the header gives the length. */
  {
    unsigned char slot[4096];
    memset(slot, 0xFF, sizeof slot);
    memcpy(slot, blob, blob_len);
    check("decode-from-slot", ellipsoid_decode(slot, sizeof slot, &spare, sizeof spare, &model),
          ELLIPSOID_OK);
    check("handle-is-storage", (const void *)model == (const void *)&spare, 1);
  }
  check("score-null-x", ellipsoid_score(model, NULL, ELLIPSOID_N, &s), ELLIPSOID_ERR_NULL);
  check("score-wrong-n", ellipsoid_score(model, x, ELLIPSOID_N - 1, &s), ELLIPSOID_ERR_LENGTH);
  check("score-wrong-n-status", s.status, ELLIPSOID_ERR_LENGTH);
  check("score-null-model", ellipsoid_score(NULL, x, ELLIPSOID_N, &s), ELLIPSOID_ERR_NULL);
  {
    static uint32_t words[8];
    check("score-misaligned-out",
          ellipsoid_score(model, x, ELLIPSOID_N, (ellipsoid_score_t *)((char *)words + 2)),
          ELLIPSOID_ERR_ALIGNMENT);
    check("decode-misaligned-handle",
          ellipsoid_decode(blob, blob_len, &spare, sizeof spare,
                           (const ellipsoid_model **)((char *)words + 2)),
          ELLIPSOID_ERR_ALIGNMENT);
  }
  check("score-null-out-still-returns", ellipsoid_score(model, x, ELLIPSOID_N, NULL), ELLIPSOID_OK);
  check("explain-null-c", ellipsoid_explain(model, x, ELLIPSOID_N, NULL, ELLIPSOID_N, &s),
        ELLIPSOID_ERR_NULL);
  c[0] = 1.0f;
  check("explain-wrong-n", ellipsoid_explain(model, x, ELLIPSOID_N, c, ELLIPSOID_N - 1, &s),
        ELLIPSOID_ERR_LENGTH);
  check("explain-wrong-n-nan", c[0] != c[0], 1);
  check("alarm-not-init", ellipsoid_alarm_update(&alarm, &s, &step), ELLIPSOID_ERR_NOT_DECODED);
  check("alarm-null", ellipsoid_alarm_init(NULL, model), ELLIPSOID_ERR_NULL);
  check("alarm-init", ellipsoid_alarm_init(&alarm, model), ELLIPSOID_OK);
  s.status = 12345;
  check("alarm-bad-status", ellipsoid_alarm_update(&alarm, &s, &step), ELLIPSOID_ERR_ARGUMENT);
  check("alarm-null-score", ellipsoid_alarm_update(&alarm, NULL, &step), ELLIPSOID_ERR_NULL);
  /* A machine without a model: fault on, one no-model event on the first reading. */
  check("no-model-init", ellipsoid_alarm_init_without_model(&alarm), ELLIPSOID_OK);
  ellipsoid_score(model, x, ELLIPSOID_N, &s);
  ellipsoid_alarm_update(&alarm, &s, &step);
  check("no-model-fault", step.fault, 1);
  check("no-model-event", step.n_events == 1 && step.events[0].cause == ELLIPSOID_FAULT_NO_MODEL, 1);
  /* A failed decode over a decoded model leaves no model behind: the old handle is refused. */
  check("redecode-fails", ellipsoid_decode(blob, 9, &spare, sizeof spare, &model),
        ELLIPSOID_ERR_BLOB_TOO_SHORT);
  check("stale-handle", ellipsoid_score((const ellipsoid_model *)&spare, x, ELLIPSOID_N, &s),
        ELLIPSOID_ERR_NOT_DECODED);
  check("status-name", strcmp(ellipsoid_status_name(ELLIPSOID_ERR_BLOB_CRC), "crc"), 0);
  check("status-name-unknown", strcmp(ellipsoid_status_name(-7), "unknown"), 0);
}

int main(int argc, char **argv) {
  if (argc != 3) {
    fprintf(stderr, "usage: host_test BLOB READINGS\n");
    return 2;
  }
  size_t blob_len, table_len;
  unsigned char *blob = slurp(argv[1], &blob_len);
  unsigned char *table = slurp(argv[2], &table_len);
  argument_checks(blob, blob_len);

  static ellipsoid_model_storage_t storage;
  static ellipsoid_alarm_t alarm;
  const ellipsoid_model *model;
  ellipsoid_status st = ellipsoid_decode(blob, blob_len, &storage, sizeof storage, &model);
  check("decode", st, ELLIPSOID_OK);
  check("alarm", ellipsoid_alarm_init(&alarm, model), ELLIPSOID_OK);
  ellipsoid_model_info_t info;
  check("info", ellipsoid_model_info(model, &info), ELLIPSOID_OK);
  printf("model id=%08x seq=%u n=%u alarm=%08x clear=%08x raise=%u clear_after=%u latch=%u\n",
         (unsigned)info.model_id, (unsigned)info.sequence, (unsigned)info.features,
         (unsigned)bits(info.alarm_threshold), (unsigned)bits(info.clear_threshold),
         info.raise_after, info.clear_after, info.latch);
  uint32_t count;
  memcpy(&count, table, 4);
  if (table_len < 4 + (size_t)count * 4 * ELLIPSOID_N) {
    fprintf(stderr, "host_test: the table is shorter than its count\n");
    return 2;
  }
  for (uint32_t i = 0; i < count; i++) {
    float x[ELLIPSOID_N], c[ELLIPSOID_N];
    memcpy(x, table + 4 + (size_t)i * 4 * ELLIPSOID_N, sizeof x);
    ellipsoid_score_t s, e;
    ellipsoid_step_t step;
    st = ellipsoid_score(model, x, ELLIPSOID_N, &s);
    if ((int)st != s.status) {
      printf("check score-status-%u FAILED: returned %d, struct %d\n", i, (int)st, s.status);
      failures++;
    }
    ellipsoid_alarm_update(&alarm, &s, &step);
    printf("r %u st=%d d2=%08x above=%u feature=%u", i, s.status, (unsigned)bits(s.d2), s.above,
           s.feature);
    print_step(&step);
    st = ellipsoid_explain(model, x, ELLIPSOID_N, c, ELLIPSOID_N, &e);
    printf(" ex=%d c=", (int)st);
    for (int k = 0; k < ELLIPSOID_N; k++) printf("%s%08x", k ? "," : "", (unsigned)bits(c[k]));
    printf("\n");
    if (i == 150) { /* inside the drift: the alarm is on */
      ellipsoid_alarm_reset(&alarm, &step);
      printf("reset");
      print_step(&step);
      printf("\n");
    }
  }
  printf("end readings=%u failures=%d\n", (unsigned)count, failures);
  free(blob);
  free(table);
  return failures ? 1 : 0;
}
