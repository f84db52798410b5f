/*
 * Asks the Holdfast advisor for one action from C.
 *
 *   cc -o advise infer/capi/examples/advise.c -I infer/capi/include \
 *      -L target/release -lholdfast -Wl,-rpath,$PWD/target/release
 *   ./advise models/quillmoor.hfmodel scenarios/quillmoor.toml scenarios/quillmoor-request.json
 *
 * Prints the JSON answer on stdout; exits 1 if the advisor cannot be opened or the request is
 * refused, 2 on bad arguments.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "holdfast.h"

/* Reads a whole file into a NUL-terminated buffer the caller frees; NULL on failure. */
static char *read_file(const char *path) {
    FILE *f = fopen(path, "rb");
    if (!f) return NULL;
    if (fseek(f, 0, SEEK_END) != 0) { fclose(f); return NULL; }
    long n = ftell(f);
    if (n < 0 || fseek(f, 0, SEEK_SET) != 0) { fclose(f); return NULL; }
    char *buf = malloc((size_t)n + 1);
    if (!buf) { fclose(f); return NULL; }
    size_t got = fread(buf, 1, (size_t)n, f);
    fclose(f);
    buf[got] = '\0';
    return buf;
}

int main(int argc, char **argv) {
    if (argc != 4) {
        fprintf(stderr, "usage: %s MODEL GRID REQUEST.json\n", argv[0]);
        return 2;
    }
    char *error = NULL;
    HoldfastAdvisor *advisor = holdfast_advisor_open(argv[1], argv[2], &error);
    if (!advisor) {
        fprintf(stderr, "cannot open the advisor: %s\n", error ? error : "(no message)");
        holdfast_string_free(error);
        return 1;
    }
    char *request = read_file(argv[3]);
    if (!request) {
        fprintf(stderr, "cannot read %s\n", argv[3]);
        holdfast_advisor_free(advisor);
        return 2;
    }
    char *answer = holdfast_advise_json(advisor, request);
    int refused = answer == NULL || strstr(answer, "\"error\"") != NULL;
    printf("%s\n", answer ? answer : "null");
    fprintf(stderr, "%s\n", holdfast_caution());
    holdfast_string_free(answer);
    free(request);
    holdfast_advisor_free(advisor);
    return refused ? 1 : 0;
}
