/*
 * hilrig_controller.h: the contract of a controller plugin written in C (docs/plugins.md,
 * "Controllers in C"). hilrig compiles the C file with this header forced in (-include), so
 * every prototype below is checked against the file's definitions by the compiler.
 *
 * A controller in C defines three things with external linkage:
 *
 *   const hilrig_controller_info hilrig_controller = { ... };   what it is (read by hilrig)
 *   void hilrig_init(const double *p, double *xc, const double *y, const double *r);
 *   int  hilrig_step(double t, const double *p, double *xc, const double *y,
 *                    const double *r, double *u);
 *
 * The same contract as a Python controller kernel (plugins/base.py):
 *   p   the parameters: first the declared ones (hilrig_controller.params), in their order and
 *       in SI units, checked against their bounds before the run; then the context values
 *       (hilrig_controller.context), in their order. Read-only.
 *   xc  the controller's states (hilrig_controller.states, in order). Recorded and watched:
 *       a non-finite state trips the run.
 *   y   the measurements named in hilrig_controller.reads, in that order, after the sensor
 *       chain (never the plant's true values).
 *   r   the shaped reference and its first four derivatives:
 *       r[0] = v_ref [V], r[1] = v_ref' [V/s], ... r[4] = v_ref'''' [V/s^4].
 *   u   the command: write u[0], the converter voltage [V].
 *   t   the time of the tick [s].
 * hilrig_init is called on tick 0 (and after an accepted reset) with the first measurement and
 * reference: set xc so that the first command is the steady-state one (bumpless start).
 * hilrig_step returns 0, or a fault code that the protect stage turns into a latched trip
 * (1 .. 998 and negative codes are reported as such; -999 is reserved).
 *
 * Rules, as for a Python kernel: no allocation, no I/O, no clock, no global mutable state (a
 * run may hold several instances; keep everything in xc), no fast-math (the interlocks rely
 * on NaN comparing false). Plain C99 with <math.h>; hilrig links -lm.
 */
#ifndef HILRIG_CONTROLLER_H
#define HILRIG_CONTROLLER_H

/* the version of this contract; hilrig refuses a library built against another */
#define HILRIG_ABI_VERSION 1

/* A scalar parameter: name (a C-like identifier; the scenario's key), its SI unit as hilrig
 * writes units ("V", "A/V", "V/(A s)", "F", "-", ...), default, closed bounds [min, max] (the
 * lower bound open when lower_open is 1) and a description. */
typedef struct {
    const char *name;
    const char *unit;
    double default_value;
    double min;
    double max;
    int lower_open;
    const char *description;
} hilrig_param;

/* A named signal (a controller state) with its SI unit. */
typedef struct {
    const char *name;
    const char *unit;
    const char *description;
} hilrig_signal;

/* A value from the run rather than from the scenario's [controller] table, appended to p after
 * the parameters: "Ts" (the control period [s]), "actuation_delay" (in control periods), or
 * "plant.NAME" (the plant's parameter NAME in SI units; fallback when the plant has no such
 * parameter, or NAN to make it required). */
typedef struct {
    const char *name;
    double fallback;
} hilrig_context;

typedef struct {
    int abi_version;               /* HILRIG_ABI_VERSION */
    const char *name;              /* the plugin's name (an identifier) */
    const char *summary;           /* one line */
    const char *source;            /* the published source of the method, or "" */
    int n_params;
    const hilrig_param *params;
    int n_states;
    const hilrig_signal *states;
    int n_reads;
    const char *const *reads;      /* names of the plant's measured signals */
    int n_context;
    const hilrig_context *context;
} hilrig_controller_info;

/* the number of elements of a static array, for the n_ fields */
#define HILRIG_COUNT(a) ((int)(sizeof(a) / sizeof((a)[0])))

extern const hilrig_controller_info hilrig_controller;
void hilrig_init(const double *p, double *xc, const double *y, const double *r);
int hilrig_step(double t, const double *p, double *xc, const double *y, const double *r,
                double *u);

#endif
