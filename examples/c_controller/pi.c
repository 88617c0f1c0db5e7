/*
 * Cascaded PI output-voltage control in plain C99: a controller plugin for hilrig written in C
 * (docs/plugins.md, "Controllers in C"). pi_numba.py beside it is the same controller as a
 * Python (numba) plugin, operation for operation; tests/integration/test_c_controller.py checks
 * that the two give the same command on every tick.
 *
 * Outer loop (voltage): i_ref = Kp_v e_v + x_v + i_out + C_ff v_ref' - K_ic (i_L2 - i_out),
 * e_v = v_ref - v_out, clamped to [-I_max, I_max].
 * Inner loop (first-stage inductor current): v = v_C1 + Kp_i e_i + x_i - K_vd (v_C1 - v_out),
 * e_i = i_ref_clamped - i_L1, clamped to [u_min, min(u_max, V_dc)].
 * Anti-windup by conditional integration: an integrator holds while its output is clamped
 * and its error pushes further into the clamp; the outer one also holds while the inner one
 * does. Bumpless start: hilrig_init presets both integrators so that the first command is the
 * steady-state one at the measured operating point.
 *
 * The default gains are those of the shipped cascaded_pi plugin's declared numbers (for the
 * demo plant at Ts = 50 us).
 */
#include <math.h>
#include "hilrig_controller.h"

/* p: the parameters in the order of params[] below, then the context values */
enum { KP_V, KI_V, KP_I, KI_I, K_VD, K_IC, C_FF, I_MAX, U_MIN, U_MAX, /* parameters */
       TS, R_SER, V_DC };                                             /* context */
/* y: the order of reads[] below */
enum { Y_VOUT, Y_IOUT, Y_IL1, Y_VC1, Y_IL2 };
/* xc */
enum { X_V, X_I };

static const hilrig_param params[] = {
    {"Kp_v", "A/V", 5.0, 0.0, 1e3, 0, "voltage-loop proportional gain"},
    {"Ki_v", "A/(V s)", 12000.0, 0.0, 1e7, 0, "voltage-loop integral gain"},
    {"Kp_i", "V/A", 2.0, 0.0, 1e3, 0, "current-loop proportional gain"},
    {"Ki_i", "V/(A s)", 3500.0, 0.0, 1e7, 0, "current-loop integral gain"},
    {"K_vd", "-", 3.7, 0.0, 100.0, 0, "active damping: gain on the L2 voltage v_C1 - v_out"},
    {"K_ic", "-", 1.0, 0.0, 100.0, 0, "active damping: gain on the output capacitor current"},
    {"C_ff", "F", 900e-6, 0.0, 1.0, 0, "reference-slope feed-forward (about C1 + C2)"},
    {"I_max", "A", 600.0, 0.0, 1e5, 1, "current-reference limit"},
    {"u_min", "V", 0.0, -1e4, 1e4, 0, "lower clamp of the converter voltage command"},
    {"u_max", "V", 1e4, -1e4, 1e4, 0, "upper clamp of the command (also limited to V_dc)"},
};
static const hilrig_signal states[] = {
    {"int_v", "A", "voltage-loop integrator"},
    {"int_i", "V", "current-loop integrator"},
};
static const char *const reads[] = {"v_out", "i_out", "i_L1", "v_C1", "i_L2"};
static const hilrig_context context[] = {
    {"Ts", NAN},           /* the control period [s] */
    {"plant.R1", 0.0},     /* series resistance of the first stage, for the bumpless start */
    {"plant.V_dc", 1e4},   /* the plant clamps the command to [0, V_dc]: clamp it the same way */
};

const hilrig_controller_info hilrig_controller = {
    HILRIG_ABI_VERSION, "pi_c",
    "Cascaded PI (outer v_out, inner i_L1), active damping, anti-windup, bumpless start",
    "Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed., 2001, ch. 18",
    HILRIG_COUNT(params), params, HILRIG_COUNT(states), states,
    HILRIG_COUNT(reads), reads, HILRIG_COUNT(context), context,
};

static double upper(const double *p)
{
    return p[U_MAX] < p[V_DC] ? p[U_MAX] : p[V_DC];
}

void hilrig_init(const double *p, double *xc, const double *y, const double *r)
{
    /* outer loop output equals the measured inductor current at zero voltage error */
    xc[X_V] = y[Y_IL1] - y[Y_IOUT] - p[C_FF] * r[1] + p[K_IC] * (y[Y_IL2] - y[Y_IOUT]);
    /* inner loop output equals the steady-state command v_C1 + R1 i_L1 at zero current error */
    xc[X_I] = p[R_SER] * y[Y_IL1] + p[K_VD] * (y[Y_VC1] - y[Y_VOUT]);
}

int hilrig_step(double t, const double *p, double *xc, const double *y, const double *r,
                double *u)
{
    const double ts = p[TS];
    const double umax = upper(p);
    (void)t;
    double ev = r[0] - y[Y_VOUT];
    double i_ref = p[KP_V] * ev + xc[X_V] + y[Y_IOUT] + p[C_FF] * r[1]
                   - p[K_IC] * (y[Y_IL2] - y[Y_IOUT]);
    double i_sat = i_ref;
    if (i_sat > p[I_MAX])
        i_sat = p[I_MAX];
    else if (i_sat < -p[I_MAX])
        i_sat = -p[I_MAX];
    double ei = i_sat - y[Y_IL1];
    double v = y[Y_VC1] + p[KP_I] * ei + xc[X_I] - p[K_VD] * (y[Y_VC1] - y[Y_VOUT]);
    double uc = v;
    if (uc > umax)
        uc = umax;
    else if (uc < p[U_MIN])
        uc = p[U_MIN];
    u[0] = uc;
    /* conditional integration: hold an integrator while its clamp is active in its direction */
    if (!((v > umax && ei > 0.0) || (v < p[U_MIN] && ei < 0.0))) {
        xc[X_I] += p[KI_I] * ts * ei;
        if (!((i_ref > p[I_MAX] && ev > 0.0) || (i_ref < -p[I_MAX] && ev < 0.0)))
            xc[X_V] += p[KI_V] * ts * ev;
    }
    return 0;
}
