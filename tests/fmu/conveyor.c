/* The conveyor drive of configs/plants/conveyor (DC motor, gearbox, belt) as an FMI 2.0
 * FMU for both model exchange and co-simulation, written for plantrig's tests against
 * the standard's headers. Co-simulation steps by classical RK4 with cs_substeps fixed
 * substeps per communication step, so a Python RK4 of the same equations must agree.
 *
 *   L di/dt  = V - R i - Ke w
 *   Jm dw/dt = Ke i - bm w - bc (w - g v)
 *   M dv/dt  = g bc (w - g v) - bl v
 */
#include <stdlib.h>
#include <string.h>
#include "fmi2Functions.h"

enum { V_IN = 1, X_I = 2, DX_I = 3, X_W = 4, DX_W = 5, X_V = 6, DX_V = 7,
       P_R = 8, P_L, P_KE, P_JM, P_BM, P_BC, P_G, P_M, P_BL, Y_I = 17, P_SUB = 18, N_VR = 19 };

typedef struct {
    double r[N_VR];
    double time;
} Model;

static void derivatives(const double *r, const double *x, double *dx) {
    double i = x[0], w = x[1], v = x[2], V = r[V_IN];
    dx[0] = (V - r[P_R] * i - r[P_KE] * w) / r[P_L];
    dx[1] = (r[P_KE] * i - r[P_BM] * w - r[P_BC] * (w - r[P_G] * v)) / r[P_JM];
    dx[2] = (r[P_G] * r[P_BC] * (w - r[P_G] * v) - r[P_BL] * v) / r[P_M];
}

static void refresh(Model *m) {
    double x[3] = {m->r[X_I], m->r[X_W], m->r[X_V]}, dx[3];
    derivatives(m->r, x, dx);
    m->r[DX_I] = dx[0]; m->r[DX_W] = dx[1]; m->r[DX_V] = dx[2];
    m->r[Y_I] = m->r[X_I];
}

const char *fmi2GetTypesPlatform(void) { return fmi2TypesPlatform; }
const char *fmi2GetVersion(void) { return fmi2Version; }
fmi2Status fmi2SetDebugLogging(fmi2Component c, fmi2Boolean on, size_t n, const fmi2String cat[]) {
    (void)c; (void)on; (void)n; (void)cat; return fmi2OK;
}

fmi2Component fmi2Instantiate(fmi2String name, fmi2Type type, fmi2String guid,
                              fmi2String location, const fmi2CallbackFunctions *cb,
                              fmi2Boolean visible, fmi2Boolean logging) {
    (void)name; (void)type; (void)location; (void)cb; (void)visible; (void)logging;
    if (strcmp(guid, "{8c4e810f-3df3-4a00-8276-176fa3c9f017}") != 0) return NULL;
    Model *m = calloc(1, sizeof(Model));
    if (!m) return NULL;
    m->r[P_R] = 1.2; m->r[P_L] = 0.02; m->r[P_KE] = 0.08; m->r[P_JM] = 3e-4;
    m->r[P_BM] = 1e-5; m->r[P_BC] = 0.01; m->r[P_G] = 200.0; m->r[P_M] = 20.0;
    m->r[P_BL] = 15.0; m->r[P_SUB] = 1.0;
    refresh(m);
    return m;
}

void fmi2FreeInstance(fmi2Component c) { free(c); }
fmi2Status fmi2SetupExperiment(fmi2Component c, fmi2Boolean td, fmi2Real tol, fmi2Real t0,
                               fmi2Boolean sd, fmi2Real t1) {
    (void)td; (void)tol; (void)sd; (void)t1; ((Model *)c)->time = t0; return fmi2OK;
}
fmi2Status fmi2EnterInitializationMode(fmi2Component c) { (void)c; return fmi2OK; }
fmi2Status fmi2ExitInitializationMode(fmi2Component c) { refresh(c); return fmi2OK; }
fmi2Status fmi2Terminate(fmi2Component c) { (void)c; return fmi2OK; }
fmi2Status fmi2Reset(fmi2Component c) { (void)c; return fmi2Error; }

fmi2Status fmi2GetReal(fmi2Component c, const fmi2ValueReference vr[], size_t n, fmi2Real v[]) {
    Model *m = c;
    refresh(m);
    for (size_t k = 0; k < n; k++) {
        if (vr[k] == 0 || vr[k] >= N_VR) return fmi2Error;
        v[k] = m->r[vr[k]];
    }
    return fmi2OK;
}
fmi2Status fmi2SetReal(fmi2Component c, const fmi2ValueReference vr[], size_t n,
                       const fmi2Real v[]) {
    Model *m = c;
    for (size_t k = 0; k < n; k++) {
        if (vr[k] == 0 || vr[k] >= N_VR) return fmi2Error;
        m->r[vr[k]] = v[k];
    }
    return fmi2OK;
}
#define UNUSED_GET(T, name) fmi2Status name(fmi2Component c, const fmi2ValueReference vr[], \
    size_t n, T v[]) { (void)c; (void)vr; (void)v; return n ? fmi2Error : fmi2OK; }
#define UNUSED_SET(T, name) fmi2Status name(fmi2Component c, const fmi2ValueReference vr[], \
    size_t n, const T v[]) { (void)c; (void)vr; (void)v; return n ? fmi2Error : fmi2OK; }
UNUSED_GET(fmi2Integer, fmi2GetInteger)
UNUSED_GET(fmi2Boolean, fmi2GetBoolean)
UNUSED_GET(fmi2String, fmi2GetString)
UNUSED_SET(fmi2Integer, fmi2SetInteger)
UNUSED_SET(fmi2Boolean, fmi2SetBoolean)
UNUSED_SET(fmi2String, fmi2SetString)

fmi2Status fmi2GetFMUstate(fmi2Component c, fmi2FMUstate *s) {
    if (!*s) *s = malloc(sizeof(Model));
    if (!*s) return fmi2Error;
    memcpy(*s, c, sizeof(Model));
    return fmi2OK;
}
fmi2Status fmi2SetFMUstate(fmi2Component c, fmi2FMUstate s) {
    memcpy(c, s, sizeof(Model)); return fmi2OK;
}
fmi2Status fmi2FreeFMUstate(fmi2Component c, fmi2FMUstate *s) {
    (void)c; free(*s); *s = NULL; return fmi2OK;
}
fmi2Status fmi2SerializedFMUstateSize(fmi2Component c, fmi2FMUstate s, size_t *n) {
    (void)c; (void)s; (void)n; return fmi2Error;
}
fmi2Status fmi2SerializeFMUstate(fmi2Component c, fmi2FMUstate s, fmi2Byte b[], size_t n) {
    (void)c; (void)s; (void)b; (void)n; return fmi2Error;
}
fmi2Status fmi2DeSerializeFMUstate(fmi2Component c, const fmi2Byte b[], size_t n,
                                   fmi2FMUstate *s) {
    (void)c; (void)b; (void)n; (void)s; return fmi2Error;
}
fmi2Status fmi2GetDirectionalDerivative(fmi2Component c, const fmi2ValueReference u[], size_t nu,
                                        const fmi2ValueReference z[], size_t nz,
                                        const fmi2Real dv[], fmi2Real dz[]) {
    (void)c; (void)u; (void)nu; (void)z; (void)nz; (void)dv; (void)dz; return fmi2Error;
}

/* model exchange */
fmi2Status fmi2EnterEventMode(fmi2Component c) { (void)c; return fmi2OK; }
fmi2Status fmi2NewDiscreteStates(fmi2Component c, fmi2EventInfo *info) {
    (void)c;
    info->newDiscreteStatesNeeded = fmi2False; info->terminateSimulation = fmi2False;
    info->nominalsOfContinuousStatesChanged = fmi2False;
    info->valuesOfContinuousStatesChanged = fmi2False;
    info->nextEventTimeDefined = fmi2False; info->nextEventTime = 0.0;
    return fmi2OK;
}
fmi2Status fmi2EnterContinuousTimeMode(fmi2Component c) { (void)c; return fmi2OK; }
fmi2Status fmi2CompletedIntegratorStep(fmi2Component c, fmi2Boolean np, fmi2Boolean *enter,
                                       fmi2Boolean *term) {
    (void)c; (void)np; *enter = fmi2False; *term = fmi2False; return fmi2OK;
}
fmi2Status fmi2SetTime(fmi2Component c, fmi2Real t) { ((Model *)c)->time = t; return fmi2OK; }
fmi2Status fmi2SetContinuousStates(fmi2Component c, const fmi2Real x[], size_t n) {
    Model *m = c;
    if (n != 3) return fmi2Error;
    m->r[X_I] = x[0]; m->r[X_W] = x[1]; m->r[X_V] = x[2];
    return fmi2OK;
}
fmi2Status fmi2GetDerivatives(fmi2Component c, fmi2Real dx[], size_t n) {
    Model *m = c;
    if (n != 3) return fmi2Error;
    refresh(m);
    dx[0] = m->r[DX_I]; dx[1] = m->r[DX_W]; dx[2] = m->r[DX_V];
    return fmi2OK;
}
fmi2Status fmi2GetEventIndicators(fmi2Component c, fmi2Real z[], size_t n) {
    (void)c; (void)z; return n ? fmi2Error : fmi2OK;
}
fmi2Status fmi2GetContinuousStates(fmi2Component c, fmi2Real x[], size_t n) {
    Model *m = c;
    if (n != 3) return fmi2Error;
    x[0] = m->r[X_I]; x[1] = m->r[X_W]; x[2] = m->r[X_V];
    return fmi2OK;
}
fmi2Status fmi2GetNominalsOfContinuousStates(fmi2Component c, fmi2Real x[], size_t n) {
    (void)c;
    for (size_t k = 0; k < n; k++) x[k] = 1.0;
    return fmi2OK;
}

/* co-simulation: RK4 with cs_substeps substeps, input held over the step */
fmi2Status fmi2SetRealInputDerivatives(fmi2Component c, const fmi2ValueReference vr[], size_t n,
                                       const fmi2Integer o[], const fmi2Real v[]) {
    (void)c; (void)vr; (void)o; (void)v; return n ? fmi2Error : fmi2OK;
}
fmi2Status fmi2GetRealOutputDerivatives(fmi2Component c, const fmi2ValueReference vr[],
                                        size_t n, const fmi2Integer o[], fmi2Real v[]) {
    (void)c; (void)vr; (void)o; (void)v; return n ? fmi2Error : fmi2OK;
}
fmi2Status fmi2DoStep(fmi2Component c, fmi2Real t, fmi2Real step, fmi2Boolean np) {
    Model *m = c;
    (void)np;
    int count = (int)m->r[P_SUB];
    if (count < 1) return fmi2Error;
    double h = step / count, x[3] = {m->r[X_I], m->r[X_W], m->r[X_V]};
    for (int s = 0; s < count; s++) {
        double k1[3], k2[3], k3[3], k4[3], y[3];
        derivatives(m->r, x, k1);
        for (int j = 0; j < 3; j++) y[j] = x[j] + h / 2 * k1[j];
        derivatives(m->r, y, k2);
        for (int j = 0; j < 3; j++) y[j] = x[j] + h / 2 * k2[j];
        derivatives(m->r, y, k3);
        for (int j = 0; j < 3; j++) y[j] = x[j] + h * k3[j];
        derivatives(m->r, y, k4);
        for (int j = 0; j < 3; j++) x[j] += h / 6 * (k1[j] + 2 * k2[j] + 2 * k3[j] + k4[j]);
    }
    m->r[X_I] = x[0]; m->r[X_W] = x[1]; m->r[X_V] = x[2];
    m->time = t + step;
    refresh(m);
    return fmi2OK;
}
fmi2Status fmi2CancelStep(fmi2Component c) { (void)c; return fmi2Error; }
fmi2Status fmi2GetStatus(fmi2Component c, const fmi2StatusKind k, fmi2Status *v) {
    (void)c; (void)k; (void)v; return fmi2Error;
}
fmi2Status fmi2GetRealStatus(fmi2Component c, const fmi2StatusKind k, fmi2Real *v) {
    (void)c; (void)k; (void)v; return fmi2Error;
}
fmi2Status fmi2GetIntegerStatus(fmi2Component c, const fmi2StatusKind k, fmi2Integer *v) {
    (void)c; (void)k; (void)v; return fmi2Error;
}
fmi2Status fmi2GetBooleanStatus(fmi2Component c, const fmi2StatusKind k, fmi2Boolean *v) {
    (void)c; (void)k; (void)v; return fmi2Error;
}
fmi2Status fmi2GetStringStatus(fmi2Component c, const fmi2StatusKind k, fmi2String *v) {
    (void)c; (void)k; (void)v; return fmi2Error;
}
