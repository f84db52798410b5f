/*
 * Holdfast advisor: C interface (libholdfast, built by `cargo build --release -p
 * holdfast-infer-capi` into target/release/libholdfast.so).
 *
 * Open an advisor once with a model file and the grid file it was trained on, then pass JSON
 * requests and receive JSON answers (the `holdfast serve` protocol; schema in DEVELOPERS.md).
 * One advisor may be used from several threads at once. Every string this library returns is
 * the caller's to free with holdfast_string_free, except holdfast_caution's.
 *
 * Decision support for studies and operators, not a protection scheme: local grid codes,
 * operating procedures and licensed engineers decide.
 */
#ifndef HOLDFAST_H
#define HOLDFAST_H

#ifdef __cplusplus
extern "C" {
#endif

/* An advisor: a model checked against its grid, ready to answer requests. */
typedef struct HoldfastAdvisor HoldfastAdvisor;

/*
 * Reads and checks the model file and the grid file. Returns NULL on failure; then, if error
 * is not NULL, *error receives a message (free it with holdfast_string_free).
 */
HoldfastAdvisor *holdfast_advisor_open(const char *model_path, const char *grid_path,
                                       char **error);

/*
 * Answers one JSON request: returns a JSON answer object, or {"id": ..., "error": "..."} when
 * the request cannot be answered. Free the result with holdfast_string_free.
 */
char *holdfast_advise_json(const HoldfastAdvisor *advisor, const char *request_json);

/* Frees a string returned by this library (NULL is ignored). */
void holdfast_string_free(char *s);

/* Frees an advisor (NULL is ignored); no other thread may be using it. */
void holdfast_advisor_free(HoldfastAdvisor *advisor);

/* The caution to show with any advice (static: do not free). */
const char *holdfast_caution(void);

#ifdef __cplusplus
}
#endif

#endif /* HOLDFAST_H */
