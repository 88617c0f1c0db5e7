/* Test FMU (FMI 2.0, model exchange and co-simulation): the averaged two-stage LC output
 * filter of hilrig's plant plugin two_stage_lc (plugins/plants/two_stage_lc.py), with the same
 * summed load (plugins/plants/loads.py), the same clamp of the converter command to [0, V_dc]
 * and the same diode model with the gates blocked (command NaN), written with the same
 * arithmetic in the same order, so that its derivatives equal the plugin's bit for bit.
 *
 * Co-simulation: fmi2DoStep integrates with n_sub classic RK4 steps of h / n_sub, each written
 * as hilrig's generic RK4 stages (runtime/loop.py _rk4_text), so that a run with n_sub equal to
 * the scenario's substeps repeats the model-exchange run.
 *
 * Built by tests/fmu/build.py at test time with the system C compiler; no binary is kept in
 * the repository. The variables and their value references are in modelDescription.xml.in
 * (FMI 2.0) and modelDescription3.xml.in (FMI 3.0, compiled with -DHILRIG_TEST_FMI3: the same
 * model behind the FMI 3.0 functions). Own minimal type definitions (the standards' names and
 * calling conventions).
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <stdbool.h>

#define EXPORT __attribute__((visibility("default")))

/* value references (modelDescription.xml) */
enum { P_VDC, P_L1, P_R1, P_C1, P_L2, P_R2, P_C2, P_VMIN, P_NSUB, N_PAR };
enum { VR_U = 10, VR_P, VR_G, VR_I };
enum { VR_X = 20, VR_DX = 30, VR_Y = 40 };
#define NX 4
#define NY 6

typedef struct {
    double par[N_PAR];
    double u, d[3];
    double x[NX];
    double t;
    int cs;
} Model;

static const double DEFAULT_PAR[N_PAR] = {800.0, 150e-6, 5e-3, 220e-6, 100e-6, 3e-3, 680e-6, 10.0, 1.0};
static const double DEFAULT_X[NX] = {0.0, 0.0, 0.0, 0.0};

static void reset_model(Model *m) {
    memcpy(m->par, DEFAULT_PAR, sizeof m->par);
    memcpy(m->x, DEFAULT_X, sizeof m->x);
    m->u = 0.0;
    m->d[0] = m->d[1] = m->d[2] = 0.0;
    m->t = 0.0;
}

/* loads.py load_current: G v + I first, then the constant-power part */
static double load_current(double v, const double *d, double vmin) {
    double rest = d[1] * v + d[2];
    double ip = (v >= vmin) ? d[0] / v : d[0] * v / (vmin * vmin);
    return ip + rest;
}

/* two_stage_lc.py _switch_node: the command clamped to [0, V_dc]; NaN: the diodes decide */
static double switch_node(const Model *m, double u, double il1, double vc1) {
    double vdc = m->par[P_VDC];
    if (u == u) {
        double uc = u;
        if (uc > vdc) uc = vdc;
        else if (!(uc >= 0.0)) uc = 0.0;
        return uc;
    }
    if (il1 > 0.0) return 0.0;
    if (il1 < 0.0) return vdc;
    if (vc1 > vdc) return vdc;
    if (vc1 < 0.0) return 0.0;
    return vc1;
}

/* two_stage_lc.py derivs; the reciprocals formed as the plugin's build does (1.0 / L) */
static void derivs(const Model *m, const double *x, double *dx) {
    double uc = switch_node(m, m->u, x[0], x[1]);
    double il = load_current(x[3], m->d, m->par[P_VMIN]);
    dx[0] = (uc - m->par[P_R1] * x[0] - x[1]) * (1.0 / m->par[P_L1]);
    dx[1] = (x[0] - x[2]) * (1.0 / m->par[P_C1]);
    dx[2] = (x[1] - m->par[P_R2] * x[2] - x[3]) * (1.0 / m->par[P_L2]);
    dx[3] = (x[2] - il) * (1.0 / m->par[P_C2]);
}

static void outputs(const Model *m, double *y) {
    y[0] = m->x[3];
    y[1] = load_current(m->x[3], m->d, m->par[P_VMIN]);
    y[2] = m->x[0];
    y[3] = m->x[1];
    y[4] = m->x[2];
    y[5] = m->par[P_VDC];
}

/* one classic RK4 step, as hilrig's generic stages */
static void rk4(const Model *m, double dt, double *s) {
    double k1[NX], k2[NX], k3[NX], k4[NX], z[NX];
    int i;
    derivs(m, s, k1);
    for (i = 0; i < NX; i++) z[i] = s[i] + 0.5 * dt * k1[i];
    derivs(m, z, k2);
    for (i = 0; i < NX; i++) z[i] = s[i] + 0.5 * dt * k2[i];
    derivs(m, z, k3);
    for (i = 0; i < NX; i++) z[i] = s[i] + dt * k3[i];
    derivs(m, z, k4);
    for (i = 0; i < NX; i++) s[i] = s[i] + dt / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
}

static int get_one(Model *m, unsigned int r, double *v) {
    double dx[NX], y[NY];
    if (r < N_PAR) { *v = m->par[r]; return 0; }
    if (r == VR_U) { *v = m->u; return 0; }
    if (r >= VR_P && r <= VR_I) { *v = m->d[r - VR_P]; return 0; }
    if (r >= VR_X && r < VR_X + NX) { *v = m->x[r - VR_X]; return 0; }
    if (r >= VR_DX && r < VR_DX + NX) { derivs(m, m->x, dx); *v = dx[r - VR_DX]; return 0; }
    if (r >= VR_Y && r < VR_Y + NY) { outputs(m, y); *v = y[r - VR_Y]; return 0; }
    return -1;
}

static int set_one(Model *m, unsigned int r, double v) {
    if (r < N_PAR) { m->par[r] = v; return 0; }
    if (r == VR_U) { m->u = v; return 0; }
    if (r >= VR_P && r <= VR_I) { m->d[r - VR_P] = v; return 0; }
    if (r >= VR_X && r < VR_X + NX) { m->x[r - VR_X] = v; return 0; }
    return -1;
}

#ifndef HILRIG_TEST_FMI3 /* FMI 2.0 */

typedef void *fmi2Component;
typedef void *fmi2ComponentEnvironment;
typedef void *fmi2FMUstate;
typedef unsigned int fmi2ValueReference;
typedef double fmi2Real;
typedef int fmi2Integer;
typedef int fmi2Boolean;
typedef char fmi2Char;
typedef const fmi2Char *fmi2String;
typedef char fmi2Byte;
typedef enum { fmi2OK, fmi2Warning, fmi2Discard, fmi2Error, fmi2Fatal, fmi2Pending } fmi2Status;
typedef enum { fmi2ModelExchange, fmi2CoSimulation } fmi2Type;
typedef enum { fmi2DoStepStatus, fmi2PendingStatus, fmi2LastSuccessfulTime, fmi2Terminated } fmi2StatusKind;
typedef struct {
    void (*logger)(fmi2ComponentEnvironment, fmi2String, fmi2Status, fmi2String, fmi2String, ...);
    void *(*allocateMemory)(size_t, size_t);
    void (*freeMemory)(void *);
    void (*stepFinished)(fmi2ComponentEnvironment, fmi2Status);
    fmi2ComponentEnvironment componentEnvironment;
} fmi2CallbackFunctions;
typedef struct {
    fmi2Boolean newDiscreteStatesNeeded, terminateSimulation, nominalsOfContinuousStatesChanged,
        valuesOfContinuousStatesChanged, nextEventTimeDefined;
    fmi2Real nextEventTime;
} fmi2EventInfo;

EXPORT const char *fmi2GetTypesPlatform(void) { return "default"; }
EXPORT const char *fmi2GetVersion(void) { return "2.0"; }
EXPORT fmi2Status fmi2SetDebugLogging(fmi2Component c, fmi2Boolean on, size_t n, const fmi2String cat[]) { return fmi2OK; }

EXPORT fmi2Component fmi2Instantiate(fmi2String name, fmi2Type type, fmi2String guid, fmi2String loc,
                                     const fmi2CallbackFunctions *cb, fmi2Boolean visible, fmi2Boolean logging) {
    Model *m = (Model *)calloc(1, sizeof(Model));
    if (!m) return NULL;
    reset_model(m);
    m->cs = (type == fmi2CoSimulation);
    return m;
}
EXPORT void fmi2FreeInstance(fmi2Component c) { free(c); }
EXPORT fmi2Status fmi2SetupExperiment(fmi2Component c, fmi2Boolean tolDef, fmi2Real tol, fmi2Real t0,
                                      fmi2Boolean stopDef, fmi2Real t1) {
    ((Model *)c)->t = t0;
    return fmi2OK;
}
EXPORT fmi2Status fmi2EnterInitializationMode(fmi2Component c) { return fmi2OK; }
EXPORT fmi2Status fmi2ExitInitializationMode(fmi2Component c) { return fmi2OK; }
EXPORT fmi2Status fmi2Terminate(fmi2Component c) { return fmi2OK; }
EXPORT fmi2Status fmi2Reset(fmi2Component c) { reset_model((Model *)c); return fmi2OK; }

EXPORT fmi2Status fmi2GetReal(fmi2Component c, const fmi2ValueReference vr[], size_t n, fmi2Real v[]) {
    size_t i;
    for (i = 0; i < n; i++)
        if (get_one((Model *)c, vr[i], &v[i])) return fmi2Error;
    return fmi2OK;
}
EXPORT fmi2Status fmi2SetReal(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2Real v[]) {
    size_t i;
    for (i = 0; i < n; i++)
        if (set_one((Model *)c, vr[i], v[i])) return fmi2Error;
    return fmi2OK;
}
EXPORT fmi2Status fmi2GetInteger(fmi2Component c, const fmi2ValueReference vr[], size_t n, fmi2Integer v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2GetBoolean(fmi2Component c, const fmi2ValueReference vr[], size_t n, fmi2Boolean v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2GetString(fmi2Component c, const fmi2ValueReference vr[], size_t n, fmi2String v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2SetInteger(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2Integer v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2SetBoolean(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2Boolean v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2SetString(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2String v[]) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2GetFMUstate(fmi2Component c, fmi2FMUstate *s) { return fmi2Error; }
EXPORT fmi2Status fmi2SetFMUstate(fmi2Component c, fmi2FMUstate s) { return fmi2Error; }
EXPORT fmi2Status fmi2FreeFMUstate(fmi2Component c, fmi2FMUstate *s) { return fmi2Error; }
EXPORT fmi2Status fmi2SerializedFMUstateSize(fmi2Component c, fmi2FMUstate s, size_t *n) { return fmi2Error; }
EXPORT fmi2Status fmi2SerializeFMUstate(fmi2Component c, fmi2FMUstate s, fmi2Byte b[], size_t n) { return fmi2Error; }
EXPORT fmi2Status fmi2DeSerializeFMUstate(fmi2Component c, const fmi2Byte b[], size_t n, fmi2FMUstate *s) { return fmi2Error; }
EXPORT fmi2Status fmi2GetDirectionalDerivative(fmi2Component c, const fmi2ValueReference a[], size_t na,
                                               const fmi2ValueReference b[], size_t nb, const fmi2Real dv[], fmi2Real r[]) { return fmi2Error; }

/* model exchange */
EXPORT fmi2Status fmi2EnterEventMode(fmi2Component c) { return fmi2OK; }
EXPORT fmi2Status fmi2NewDiscreteStates(fmi2Component c, fmi2EventInfo *e) {
    memset(e, 0, sizeof *e);
    return fmi2OK;
}
EXPORT fmi2Status fmi2EnterContinuousTimeMode(fmi2Component c) { return fmi2OK; }
EXPORT fmi2Status fmi2CompletedIntegratorStep(fmi2Component c, fmi2Boolean noSet, fmi2Boolean *enter, fmi2Boolean *term) {
    *enter = 0;
    *term = 0;
    return fmi2OK;
}
EXPORT fmi2Status fmi2SetTime(fmi2Component c, fmi2Real t) { ((Model *)c)->t = t; return fmi2OK; }
EXPORT fmi2Status fmi2SetContinuousStates(fmi2Component c, const fmi2Real x[], size_t n) {
    if (n != NX) return fmi2Error;
    memcpy(((Model *)c)->x, x, sizeof(double) * NX);
    return fmi2OK;
}
EXPORT fmi2Status fmi2GetDerivatives(fmi2Component c, fmi2Real dx[], size_t n) {
    if (n != NX) return fmi2Error;
    derivs((Model *)c, ((Model *)c)->x, dx);
    return fmi2OK;
}
EXPORT fmi2Status fmi2GetEventIndicators(fmi2Component c, fmi2Real z[], size_t n) { return n ? fmi2Error : fmi2OK; }
EXPORT fmi2Status fmi2GetContinuousStates(fmi2Component c, fmi2Real x[], size_t n) {
    if (n != NX) return fmi2Error;
    memcpy(x, ((Model *)c)->x, sizeof(double) * NX);
    return fmi2OK;
}
EXPORT fmi2Status fmi2GetNominalsOfContinuousStates(fmi2Component c, fmi2Real x[], size_t n) {
    size_t i;
    for (i = 0; i < n; i++) x[i] = 1.0;
    return fmi2OK;
}

/* co-simulation */
EXPORT fmi2Status fmi2SetRealInputDerivatives(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2Integer o[], const fmi2Real v[]) { return fmi2Error; }
EXPORT fmi2Status fmi2GetRealOutputDerivatives(fmi2Component c, const fmi2ValueReference vr[], size_t n, const fmi2Integer o[], fmi2Real v[]) { return fmi2Error; }
EXPORT fmi2Status fmi2DoStep(fmi2Component c, fmi2Real t, fmi2Real h, fmi2Boolean noSetPrior) {
    Model *m = (Model *)c;
    int n = (int)m->par[P_NSUB], j;
    double dt;
    if (n < 1) return fmi2Error;
    dt = h / n;
    for (j = 0; j < n; j++) rk4(m, dt, m->x);
    m->t = t + h;
    return fmi2OK;
}
EXPORT fmi2Status fmi2CancelStep(fmi2Component c) { return fmi2Error; }
EXPORT fmi2Status fmi2GetStatus(fmi2Component c, const fmi2StatusKind k, fmi2Status *v) { return fmi2Error; }
EXPORT fmi2Status fmi2GetRealStatus(fmi2Component c, const fmi2StatusKind k, fmi2Real *v) { return fmi2Error; }
EXPORT fmi2Status fmi2GetIntegerStatus(fmi2Component c, const fmi2StatusKind k, fmi2Integer *v) { return fmi2Error; }
EXPORT fmi2Status fmi2GetBooleanStatus(fmi2Component c, const fmi2StatusKind k, fmi2Boolean *v) { return fmi2Error; }
EXPORT fmi2Status fmi2GetStringStatus(fmi2Component c, const fmi2StatusKind k, fmi2String *v) { return fmi2Error; }

#else /* FMI 3.0 */

typedef void *fmi3Instance;
typedef unsigned int fmi3ValueReference;
enum { fmi3OK, fmi3Warning, fmi3Discard, fmi3Error, fmi3Fatal };

EXPORT const char *fmi3GetVersion(void) { return "3.0"; }
EXPORT int fmi3SetDebugLogging(fmi3Instance c, bool on, size_t n, const char *const cat[]) { return fmi3OK; }
EXPORT fmi3Instance fmi3InstantiateModelExchange(const char *name, const char *token, const char *res, bool visible,
                                                 bool logging, void *env, void *log) {
    Model *m = (Model *)calloc(1, sizeof(Model));
    if (!m) return NULL;
    reset_model(m);
    return m;
}
EXPORT fmi3Instance fmi3InstantiateCoSimulation(const char *name, const char *token, const char *res, bool visible,
                                                bool logging, bool eventModeUsed, bool earlyReturnAllowed,
                                                const fmi3ValueReference req[], size_t nreq, void *env, void *log,
                                                void *update) {
    Model *m = (Model *)calloc(1, sizeof(Model));
    if (!m) return NULL;
    reset_model(m);
    m->cs = 1;
    return m;
}
EXPORT void fmi3FreeInstance(fmi3Instance c) { free(c); }
EXPORT int fmi3EnterInitializationMode(fmi3Instance c, bool tolDef, double tol, double t0, bool stopDef, double t1) {
    ((Model *)c)->t = t0;
    return fmi3OK;
}
EXPORT int fmi3ExitInitializationMode(fmi3Instance c) { return fmi3OK; }
EXPORT int fmi3EnterEventMode(fmi3Instance c) { return fmi3OK; }
EXPORT int fmi3Terminate(fmi3Instance c) { return fmi3OK; }
EXPORT int fmi3Reset(fmi3Instance c) { reset_model((Model *)c); return fmi3OK; }
EXPORT int fmi3GetFloat64(fmi3Instance c, const fmi3ValueReference vr[], size_t n, double v[], size_t nv) {
    size_t i;
    if (nv != n) return fmi3Error;
    for (i = 0; i < n; i++)
        if (get_one((Model *)c, vr[i], &v[i])) return fmi3Error;
    return fmi3OK;
}
EXPORT int fmi3SetFloat64(fmi3Instance c, const fmi3ValueReference vr[], size_t n, const double v[], size_t nv) {
    size_t i;
    if (nv != n) return fmi3Error;
    for (i = 0; i < n; i++)
        if (set_one((Model *)c, vr[i], v[i])) return fmi3Error;
    return fmi3OK;
}
EXPORT int fmi3UpdateDiscreteStates(fmi3Instance c, bool *update, bool *term, bool *nominals, bool *values,
                                    bool *nextDefined, double *next) {
    *update = *term = *nominals = *values = *nextDefined = false;
    *next = 0.0;
    return fmi3OK;
}
EXPORT int fmi3EnterContinuousTimeMode(fmi3Instance c) { return fmi3OK; }
EXPORT int fmi3CompletedIntegratorStep(fmi3Instance c, bool noSet, bool *enter, bool *term) {
    *enter = *term = false;
    return fmi3OK;
}
EXPORT int fmi3SetTime(fmi3Instance c, double t) { ((Model *)c)->t = t; return fmi3OK; }
EXPORT int fmi3SetContinuousStates(fmi3Instance c, const double x[], size_t n) {
    if (n != NX) return fmi3Error;
    memcpy(((Model *)c)->x, x, sizeof(double) * NX);
    return fmi3OK;
}
EXPORT int fmi3GetContinuousStateDerivatives(fmi3Instance c, double dx[], size_t n) {
    if (n != NX) return fmi3Error;
    derivs((Model *)c, ((Model *)c)->x, dx);
    return fmi3OK;
}
EXPORT int fmi3GetContinuousStates(fmi3Instance c, double x[], size_t n) {
    if (n != NX) return fmi3Error;
    memcpy(x, ((Model *)c)->x, sizeof(double) * NX);
    return fmi3OK;
}
EXPORT int fmi3GetNominalsOfContinuousStates(fmi3Instance c, double x[], size_t n) {
    size_t i;
    for (i = 0; i < n; i++) x[i] = 1.0;
    return fmi3OK;
}
EXPORT int fmi3GetEventIndicators(fmi3Instance c, double z[], size_t n) { return n ? fmi3Error : fmi3OK; }
EXPORT int fmi3GetNumberOfEventIndicators(fmi3Instance c, size_t *n) { *n = 0; return fmi3OK; }
EXPORT int fmi3GetNumberOfContinuousStates(fmi3Instance c, size_t *n) { *n = NX; return fmi3OK; }
EXPORT int fmi3EnterStepMode(fmi3Instance c) { return fmi3OK; }
EXPORT int fmi3DoStep(fmi3Instance c, double t, double h, bool noSet, bool *eventNeeded, bool *term,
                      bool *early, double *last) {
    Model *m = (Model *)c;
    int n = (int)m->par[P_NSUB], j;
    double dt;
    *eventNeeded = *term = *early = false;
    if (n < 1) return fmi3Error;
    dt = h / n;
    for (j = 0; j < n; j++) rk4(m, dt, m->x);
    m->t = t + h;
    *last = m->t;
    return fmi3OK;
}

/* the rest of the FMI 3.0 interface, unused by this model (fmpy binds every function) */
#define STUB(name) EXPORT int name(void) { return fmi3Error; }
STUB(fmi3ActivateModelPartition)
STUB(fmi3DeserializeFMUState)
STUB(fmi3EnterConfigurationMode)
STUB(fmi3EvaluateDiscreteStates)
STUB(fmi3ExitConfigurationMode)
STUB(fmi3FreeFMUState)
STUB(fmi3GetAdjointDerivative)
STUB(fmi3GetBinary)
STUB(fmi3GetBoolean)
STUB(fmi3GetClock)
STUB(fmi3GetDirectionalDerivative)
STUB(fmi3GetFMUState)
STUB(fmi3GetFloat32)
STUB(fmi3GetInt16)
STUB(fmi3GetInt32)
STUB(fmi3GetInt64)
STUB(fmi3GetInt8)
STUB(fmi3GetIntervalDecimal)
STUB(fmi3GetIntervalFraction)
STUB(fmi3GetNumberOfVariableDependencies)
STUB(fmi3GetOutputDerivatives)
STUB(fmi3GetShiftDecimal)
STUB(fmi3GetShiftFraction)
STUB(fmi3GetString)
STUB(fmi3GetUInt16)
STUB(fmi3GetUInt32)
STUB(fmi3GetUInt64)
STUB(fmi3GetUInt8)
STUB(fmi3GetVariableDependencies)
STUB(fmi3InstantiateScheduledExecution)
STUB(fmi3SerializeFMUState)
STUB(fmi3SerializedFMUStateSize)
STUB(fmi3SetBinary)
STUB(fmi3SetBoolean)
STUB(fmi3SetClock)
STUB(fmi3SetFMUState)
STUB(fmi3SetFloat32)
STUB(fmi3SetInt16)
STUB(fmi3SetInt32)
STUB(fmi3SetInt64)
STUB(fmi3SetInt8)
STUB(fmi3SetIntervalDecimal)
STUB(fmi3SetIntervalFraction)
STUB(fmi3SetShiftDecimal)
STUB(fmi3SetShiftFraction)
STUB(fmi3SetString)
STUB(fmi3SetUInt16)
STUB(fmi3SetUInt32)
STUB(fmi3SetUInt64)
STUB(fmi3SetUInt8)

#endif
