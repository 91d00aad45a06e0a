/*
 * sim.c - the invented demo survey (see sim.h for the scenario and its
 * invariants).
 *
 * Design: one xoshiro256** stream drives everything, consumed in a fixed
 * order, so a seed fixes the output.  Time is kept as integer micro-days
 * from the start so that visit times and history times are exact, and
 * every value put into a packet is quantised once, here, so the JSON and
 * Avro encodings carry the same numbers.  Each field's slots are evaluated
 * in slot order at every visit of the field, detected or not, so the
 * stateful models (damped random walk, flare state) advance with the
 * field's own visits.  Fluxes are in units where magnitude 25 has flux 1.
 */
#include "sim.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../core/rng.h"

#define UD_PER_DAY 1000000.0
#define LN10_04 0.9210340371976184  /* 0.4 ln 10 */
#define POGSON 1.0857362047581294   /* 2.5 / ln 10 */
#define ERR_FLOOR 0.005             /* calibration floor, mag (common practice) */
#define FIELD_HALF_DEG 1.2          /* half-width of a field */
#define SURVEY_AGE_DAYS 1000.0      /* survey running before the burn-in (invented) */

static const char sim_schema_text[] =
    "{\"type\":\"record\",\"name\":\"Packet\",\"namespace\":\"oddsky.demo\",\"doc\":\""
    "One alert packet of the invented oddsky demo survey: a detection o"
    "n a difference image, with the earlier detections of the same sour"
    "ce.\",\"fields\":[{\"name\":\"packet_id\",\"type\":\"long\",\"doc\":\"Unique per"
    " packet, increasing in emission order.\"},{\"name\":\"source\",\"type\":{"
    "\"type\":\"record\",\"name\":\"Source\",\"fields\":[{\"name\":\"id\",\"type\":\"lon"
    "g\",\"doc\":\"Stable identifier of the source across its packets.\"},{\""
    "name\":\"ra_deg\",\"type\":\"double\",\"doc\":\"Right ascension, degrees (J2"
    "000).\"},{\"name\":\"dec_deg\",\"type\":\"double\",\"doc\":\"Declination, degr"
    "ees (J2000).\"},{\"name\":\"first_mjd\",\"type\":\"double\",\"doc\":\"Time of "
    "the source's first detection in the survey, MJD days (it may prece"
    "de the history horizon).\"}]}},{\"name\":\"obs\",\"type\":{\"type\":\"record"
    "\",\"name\":\"Detection\",\"fields\":[{\"name\":\"mjd\",\"type\":\"double\",\"doc\""
    ":\"Visit time, MJD days.\"},{\"name\":\"band\",\"type\":\"string\",\"doc\":\"Fi"
    "lter: one of u g r i z y.\"},{\"name\":\"mag\",\"type\":\"double\",\"doc\":\"M"
    "agnitude of the detection.\"},{\"name\":\"mag_err\",\"type\":\"double\",\"do"
    "c\":\"1-sigma magnitude error.\"},{\"name\":\"quality\",\"type\":\"double\",\""
    "doc\":\"Detection quality score, 0 (junk) to 1 (clean).\"},{\"name\":\"f"
    "ield\",\"type\":\"int\",\"doc\":\"Survey field of the visit.\"},{\"name\":\"mo"
    "ver_sep_arcsec\",\"type\":\"double\",\"doc\":\"Separation from the predict"
    "ed position of the nearest known moving body, arcsec; 60 when none"
    " is within the 60 arcsec search radius.\"}]}},{\"name\":\"history\",\"do"
    "c\":\"Earlier detections of the same source, oldest first (at most 6"
    "4, none older than the history horizon).\",\"type\":{\"type\":\"array\",\""
    "items\":{\"type\":\"record\",\"name\":\"PastDetection\",\"fields\":[{\"name\":\""
    "mjd\",\"type\":\"double\"},{\"name\":\"band\",\"type\":\"string\"},{\"name\":\"mag"
    "\",\"type\":\"double\"},{\"name\":\"mag_err\",\"type\":\"double\"}]}}},{\"name\":"
    "\"prior_limit\",\"default\":null,\"doc\":\"The most recent earlier visit "
    "of this position in which the source was not detected (none older "
    "than the history horizon); null when there is none.\",\"type\":[\"null"
    "\",{\"type\":\"record\",\"name\":\"Limit\",\"fields\":[{\"name\":\"mjd\",\"type\":\""
    "double\",\"doc\":\"Visit time, MJD days.\"},{\"name\":\"band\",\"type\":\"stri"
    "ng\",\"doc\":\"Filter of that visit.\"},{\"name\":\"mag\",\"type\":\"double\",\""
    "doc\":\"5-sigma limiting magnitude of that visit.\"}]}]},{\"name\":\"hos"
    "t\",\"default\":null,\"doc\":\"The nearest catalogued galaxy within 10 a"
    "rcsec of the position; null when the catalogue has none there.\",\"t"
    "ype\":[\"null\",{\"type\":\"record\",\"name\":\"Host\",\"fields\":[{\"name\":\"sep"
    "_arcsec\",\"type\":\"double\",\"doc\":\"Separation of the position from th"
    "e galaxy's centre, arcsec.\"},{\"name\":\"dist_mod\",\"type\":\"double\",\"d"
    "oc\":\"Distance modulus from the galaxy's photometric redshift, mag "
    "(about 0.3 mag uncertain).\"}]}]},{\"name\":\"truth\",\"doc\":\"Simulated "
    "population, for evaluation only: models must not read it.\",\"type\":"
    "{\"type\":\"enum\",\"name\":\"Population\",\"symbols\":[\"sn_thermo\",\"sn_cc\","
    "\"periodic\",\"nuclear_drw\",\"flare\",\"moving\",\"artefact\",\"rare_fast_bl"
    "ue\",\"rare_fast_red\",\"rare_slow_riser\"]}}]}";

/* ---- the invented instrument ------------------------------------------ */

/* Nominal 5-sigma limiting magnitude per band (invented). */
static const double band_m5[SIM_NBANDS] = {22.4, 23.2, 23.0, 22.6, 22.0, 21.2};
static const char band_letter[SIM_NBANDS][2] = {"u", "g", "r", "i", "z", "y"};

/* Band pairs taken on the two visits of a night, with weights (invented). */
static const uint8_t pair_band[7][2] = {
    {1, 2}, {2, 3}, {3, 4}, {4, 5}, {0, 1}, {1, 3}, {2, 4}};
static const double pair_weight[7] = {0.25, 0.25, 0.15, 0.10, 0.08, 0.10, 0.07};

#define M5_REF 23.0  /* the r-band limit, used to place magnitudes */

/* ---- populations -------------------------------------------------------- */

/* Bazin-type populations: peak colour m_b - m_r at maximum, per-band
 * factor on tau_fall, rise and fall time-scale ranges (days), peak r
 * magnitude range below the r limit, the phase window at spawn (days
 * before peak, days after peak at start-up) and the longest life after
 * peak.  All invented, loosely shaped after the rise times, decline rates
 * and colours of the classes they stand in for.  The peak absolute
 * magnitudes (which place the host's distance) follow published figures:
 * thermonuclear M ~ -19.3 and core collapse M ~ -17 with a spread of about
 * a magnitude (Richardson et al. 2014, AJ 147, 118); fast blue optical
 * transients -16.5 to -20 and brighter (Drout et al. 2014, ApJ 794, 23),
 * here the luminous end; a fast-fading red transient near -16, like the
 * kilonova of 2017 (Cowperthwaite et al. 2017, ApJL 848, L17); slow
 * luminous risers brighter than -21 (Gal-Yam 2012, Science 337, 927). */
typedef struct bazin_pop {
    double colour[SIM_NBANDS];
    double fall_factor[SIM_NBANDS];
    double tau_rise[2], tau_fall[2];
    double peak_below_m5[2];  /* peak_r = M5_REF - U(a, b) */
    double before_peak, after_peak_init, max_life;
    double abs_peak[2];       /* r-band peak absolute magnitude: mean, sd */
} bazin_pop;

static const bazin_pop bazin_table[SIM_POP_COUNT_] = {
    [SIM_POP_SN_THERMO] = {{0.55, 0.05, 0.0, 0.30, 0.40, 0.50},
                           {0.75, 0.85, 1.0, 1.15, 1.25, 1.30},
                           {1.2, 2.5}, {18.0, 32.0}, {0.4, 3.2},
                           12.0, 40.0, 120.0, {-19.3, 0.4}},
    [SIM_POP_SN_CC] = {{0.95, 0.35, 0.0, -0.10, -0.15, -0.20},
                       {0.60, 0.80, 1.0, 1.10, 1.15, 1.20},
                       {1.5, 5.0}, {35.0, 90.0}, {0.3, 2.5},
                       10.0, 80.0, 250.0, {-17.0, 1.0}},
    [SIM_POP_FAST_BLUE] = {{-0.50, -0.30, 0.0, 0.20, 0.35, 0.45},
                           {0.80, 0.90, 1.0, 1.10, 1.20, 1.20},
                           {0.4, 1.0}, {2.0, 5.0}, {1.5, 3.5},
                           2.0, 5.0, 20.0, {-20.2, 0.5}},
    [SIM_POP_FAST_RED] = {{2.00, 1.00, 0.0, -0.50, -0.80, -1.00},
                          {0.60, 0.80, 1.0, 1.20, 1.30, 1.40},
                          {0.3, 0.8}, {1.5, 4.0}, {1.0, 3.0},
                          1.5, 4.0, 20.0, {-16.0, 0.5}},
    [SIM_POP_SLOW_RISER] = {{0.60, 0.25, 0.0, -0.05, -0.10, -0.10},
                            {1.0, 1.0, 1.0, 1.0, 1.0, 1.0},
                            {20.0, 40.0}, {150.0, 300.0}, {1.0, 2.8},
                            90.0, 100.0, 500.0, {-21.5, 0.5}},
};

/* Colour offsets m_b - m_r of a star along an invented linear locus in g-r. */
static void stellar_offsets(double gr, float off[SIM_NBANDS])
{
    off[0] = (float)(1.0 + 2.0 * gr);
    off[1] = (float)gr;
    off[2] = 0.0f;
    off[3] = (float)(-0.35 * gr - 0.05);
    off[4] = (float)(-0.55 * gr - 0.08);
    off[5] = (float)(-0.65 * gr - 0.10);
}

/* Relative DRW amplitude and flare amplitude per band (bluer = larger). */
static const double drw_band_gain[SIM_NBANDS] = {1.5, 1.25, 1.0, 0.9, 0.8, 0.75};
static const double flare_band_gain[SIM_NBANDS] = {2.2, 1.0, 0.45, 0.25, 0.15, 0.10};

/* ---- state -------------------------------------------------------------- */

typedef struct hist_entry {
    int64_t t_ud;   /* micro-days from the start */
    int32_t mag_q;  /* 1e-4 mag */
    uint16_t err_q; /* 1e-4 mag */
    uint8_t band;
} hist_entry;

/* A visit of a position without a detection: time, band, limit. */
typedef struct nondet {
    int64_t t_ud;
    int32_t m5_q;   /* 1e-4 mag */
    uint8_t band;
    uint8_t valid;
} nondet;

typedef struct src {
    int64_t id;
    int64_t ra_q, dec_q;  /* 1e-6 degree */
    uint8_t pop;
    uint16_t hist_n, hist_head;
    uint8_t seen;         /* detected at least once */
    int64_t first_ud;     /* its first detection (when seen) */
    nondet nd;            /* latest visit that did not detect it */
    uint8_t has_host;     /* a catalogued galaxy within SIM_HOST_RADIUS */
    float host_sep, host_mu;  /* its separation (arcsec), distance modulus */
    union {
        struct {
            double t0, t_peak;
            float tau_rise[SIM_NBANDS], tau_fall[SIM_NBANDS], amp[SIM_NBANDS];
        } bz;
        struct {
            double period, phase0;
            float mean[SIM_NBANDS], amp[SIM_NBANDS];
            uint8_t sawtooth;
        } per;
        struct {
            double t_last;
            double x, tau, sigma;
            float mean[SIM_NBANDS];
        } drw;
        struct {
            double t_peak, t_half, amp;
            float quiet[SIM_NBANDS];
        } fl;
    } m;
} src;

typedef struct field {
    double ra_deg, dec_deg, cos_dec;
    unsigned next_night;
    nondet last;          /* the field's previous visit */
} field;

typedef struct visit {
    int64_t t_ud;
    uint32_t field;
    uint8_t band;
} visit;

struct sim {
    sim_params p;
    rng r;
    int64_t start_q;       /* start_mjd in micro-days */
    int64_t horizon_ud;
    unsigned n_slots;
    field *fields;
    src *srcs;
    hist_entry *ring;      /* n_slots * history_max */
    visit *visits;         /* tonight's, sorted by time */
    unsigned n_visits, vi, si;
    unsigned night;        /* next night to plan */
    unsigned last_night;
    double cur_m5;         /* limit of the current visit */
    double cur_t;          /* days from start */
    int64_t next_packet_id, next_source_id;
    unsigned slots_of[SIM_POP_COUNT_];
};

/* ---- small helpers -------------------------------------------------------- */

static inline double uni(sim *s, double a, double b)
{
    return a + (b - a) * rng_uniform(&s->r);
}

static inline double mag_to_flux(double m)
{
    return exp(-LN10_04 * (m - 25.0));
}

static inline double flux_to_mag(double f)
{
    return 25.0 - POGSON * log(f);
}

static inline int64_t quant(double v, double scale)
{
    return (int64_t)llround(v * scale);
}

const char *sim_pop_name(int pop)
{
    static const char *names[] = {
#define SIM_POP_NAME(sym, name) name,
        SIM_POP_MAP(SIM_POP_NAME)
#undef SIM_POP_NAME
    };
    if (pop < 0 || pop >= (int)SIM_POP_COUNT_)
        return "?";
    return names[pop];
}

const char *sim_band_name(int band)
{
    if (band < 0 || band >= (int)SIM_NBANDS)
        return "?";
    return band_letter[band];
}

const char *sim_schema_json(void)
{
    return sim_schema_text;
}

/* ---- light-curve models ----------------------------------------------- */

double sim_bazin_flux(double t, double a, double b, double t0,
                      double tau_rise, double tau_fall)
{
    /* Bazin et al. 2009, A&A 499, 653, eq. 1. */
    double dt = t - t0;
    return a * exp(-dt / tau_fall) / (1.0 + exp(-dt / tau_rise)) + b;
}

double sim_bazin_t_peak(double t0, double tau_rise, double tau_fall)
{
    /* d f / d t = 0 of eq. 1 gives exp(-dt/tau_rise) = tau_rise /
     * (tau_fall - tau_rise), i.e. dt = tau_rise ln(tau_fall/tau_rise - 1). */
    return t0 + tau_rise * log(tau_fall / tau_rise - 1.0);
}

double sim_drw_step(double x, double mean, double tau, double sigma_inf,
                    double dt, double z)
{
    /* Kelly, Bechtold & Siemiginowska 2009, ApJ 698, 895: the OU process
     * conditional on x(t) is Gaussian with mean mean + (x - mean) a and
     * variance (tau sigma^2 / 2)(1 - a^2), a = exp(-dt/tau); here the
     * stationary variance tau sigma^2 / 2 is written sigma_inf^2. */
    double a = exp(-dt / tau);
    return mean + (x - mean) * a + sigma_inf * sqrt(1.0 - a * a) * z;
}

double sim_flare_template(double t)
{
    /* Davenport et al. 2014, ApJ 797, 122, eq. 1 (rise, -1 <= t <= 0) and
     * eq. 4 (decay, t > 0), t in units of the full width at half maximum
     * t_1/2 (coefficients from memory). */
    if (t < -1.0)
        return 0.0;
    if (t <= 0.0)
        return 1.0 + 1.941 * t - 0.175 * t * t - 2.246 * t * t * t -
               1.125 * t * t * t * t;
    return 0.6890 * exp(-1.600 * t) + 0.3030 * exp(-0.2783 * t);
}

double sim_mag_err(double m, double m5)
{
    /* Sky-limited noise (common practice): the flux error is the same for
     * every source on a visit, sigma_f = f5 / 5, so SNR = 5 f / f5. */
    double snr = 5.0 * exp(-LN10_04 * (m - m5));
    return POGSON / snr;
}

/* ---- params --------------------------------------------------------------- */

void sim_params_default(sim_params *p)
{
    memset(p, 0, sizeof *p);
    p->seed = 1;
    p->start_mjd = 61200.0;
    p->n_fields = 500;
    p->burst = 40;
    p->history_max = 30;
    p->history_days = 30.0;
    p->clear_fraction = 0.85;
    p->burn_in_nights = 30;
    p->mix[SIM_POP_SN_THERMO] = 0.12;
    p->mix[SIM_POP_SN_CC] = 0.10;
    p->mix[SIM_POP_PERIODIC] = 0.25;
    p->mix[SIM_POP_NUCLEAR] = 0.20;
    p->mix[SIM_POP_FLARE] = 0.10;
    p->mix[SIM_POP_MOVING] = 0.13;
    p->mix[SIM_POP_ARTEFACT] = 0.10;
    for (unsigned i = 0; i < SIM_N_RARE; i++)
        p->rare_rate[i] = 5e-4;
}

int sim_params_check(const sim_params *p, char *err, size_t errlen)
{
    const char *why = NULL;
    double msum = 0.0, rsum = 0.0;
    for (unsigned i = 0; i < SIM_N_COMMON; i++) {
        if (!(p->mix[i] >= 0.0) || !isfinite(p->mix[i]))
            why = "mix weights must be finite and >= 0";
        msum += p->mix[i];
    }
    for (unsigned i = 0; i < SIM_N_RARE; i++) {
        if (!(p->rare_rate[i] >= 0.0 && p->rare_rate[i] <= 1.0))
            why = "rare rates must be in [0, 1]";
        rsum += p->rare_rate[i];
    }
    if (!why && !(msum > 0.0) && rsum < 1.0)
        why = "mix weights sum to zero";
    if (!why && rsum > 1.0)
        why = "rare rates sum above 1";
    if (!why && !(isfinite(p->start_mjd) && p->start_mjd >= 0.0 &&
                  p->start_mjd < 1e6))
        why = "start_mjd must be in [0, 1e6)";
    if (!why && (p->n_fields < 1 || p->n_fields > 100000))
        why = "n_fields must be in [1, 100000]";
    if (!why && (p->burst < 1 || p->burst > 10000))
        why = "burst must be in [1, 10000]";
    if (!why && (uint64_t)p->n_fields * p->burst > 4000000u)
        why = "n_fields * burst must be <= 4000000";
    if (!why && (p->history_max < 1 || p->history_max > SIM_HISTORY_CAP))
        why = "history_max must be in [1, 64]";
    if (!why && !(p->history_days > 0.0 && p->history_days <= 1000.0))
        why = "history_days must be in (0, 1000]";
    if (!why && !(p->clear_fraction > 0.0 && p->clear_fraction <= 1.0))
        why = "clear_fraction must be in (0, 1]";
    if (!why && p->burn_in_nights > 1000)
        why = "burn_in_nights must be in [0, 1000]";
    if (!why && !(p->start_mjd - (double)p->burn_in_nights >= 0.0))
        why = "start_mjd minus burn_in_nights must not be negative";
    if (why) {
        if (err && errlen)
            snprintf(err, errlen, "%s", why);
        return -1;
    }
    return 0;
}

/* ---- spawning sources --------------------------------------------------- */

static void place_source(sim *s, src *o, unsigned f)
{
    const field *fd = &s->fields[f];
    double dec = fd->dec_deg + uni(s, -FIELD_HALF_DEG, FIELD_HALF_DEG);
    double ra = fd->ra_deg + uni(s, -FIELD_HALF_DEG, FIELD_HALF_DEG) / fd->cos_dec;
    ra = fmod(ra + 360.0, 360.0);
    o->ra_q = quant(ra, 1e6);
    if (o->ra_q >= 360000000)
        o->ra_q -= 360000000;
    o->dec_q = quant(dec, 1e6);
}

/* Host galaxies (invented rates and spreads).  The catalogue's distance
 * modulus comes from a photometric redshift, off by a normal 0.3 mag; 12%
 * of the transients sit in galaxies below the catalogue's limit; a
 * random position has a catalogued galaxy within the search radius about
 * half the time (galaxy counts of order 1e5 per square degree), at a
 * distance modulus spread around 41. */
#define HOST_MU_ERR 0.3
#define HOSTLESS_SHARE 0.12
#define CHANCE_GALAXY_SHARE 0.5

static void host_set(sim *s, src *o, double sep, double mu)
{
    if (sep > SIM_HOST_RADIUS)
        sep = SIM_HOST_RADIUS;
    if (sep < 0.01)
        sep = 0.01;  /* astrometric floor (invented) */
    o->has_host = 1;
    o->host_sep = (float)sep;
    o->host_mu = (float)(mu + HOST_MU_ERR * rng_normal(&s->r));
}

/* A galaxy by chance near a star, a moving body or an artefact. */
static void host_chance(sim *s, src *o)
{
    o->has_host = 0;
    if (rng_uniform(&s->r) < CHANCE_GALAXY_SHARE)
        host_set(s, o, SIM_HOST_RADIUS * sqrt(rng_uniform(&s->r)),
                 41.0 + 1.5 * rng_normal(&s->r));
}

/* A transient in a galaxy at distance modulus mu, offset from its centre
 * by a Gamma(2) radius whose scale shrinks with distance (0.5 arcsec at
 * mu = 40); nuclear: within about 0.1 arcsec of the centre. */
static void host_own(sim *s, src *o, double mu, int nuclear)
{
    o->has_host = 0;
    if (nuclear) {
        host_set(s, o, 0.1 * sqrt(-2.0 * log1p(-rng_uniform(&s->r))), mu);
        return;
    }
    if (rng_uniform(&s->r) < HOSTLESS_SHARE)
        return;
    double scale = 0.5 * pow(10.0, -(mu - 40.0) / 5.0);
    double sep = -scale * (log1p(-rng_uniform(&s->r)) + log1p(-rng_uniform(&s->r)));
    host_set(s, o, sep, mu);
}

static double bazin_rflux(const src *o, double t)
{
    return o->m.bz.amp[2] * sim_bazin_flux(t, 1.0, 0.0, o->m.bz.t0,
                                           o->m.bz.tau_rise[2],
                                           o->m.bz.tau_fall[2]);
}

/* A new Bazin-type source whose r-band maximum sits `before` days after t
 * (negative: already past the peak). */
static void spawn_bazin(sim *s, src *o, double t, int initial)
{
    const bazin_pop *bp = &bazin_table[o->pop];
    double tr = uni(s, bp->tau_rise[0], bp->tau_rise[1]);
    double tf = uni(s, bp->tau_fall[0], bp->tau_fall[1]);
    double peak_r = M5_REF - uni(s, bp->peak_below_m5[0], bp->peak_below_m5[1]);
    host_own(s, o, peak_r - (bp->abs_peak[0] + bp->abs_peak[1] * rng_normal(&s->r)), 0);
    for (unsigned b = 0; b < SIM_NBANDS; b++) {
        double trb = tr * (1.0 + 0.05 * rng_normal(&s->r));
        double tfb = tf * bp->fall_factor[b];
        if (tfb < 2.5 * trb)
            tfb = 2.5 * trb;
        double tp = trb * log(tfb / trb - 1.0);
        double norm = exp(-tp / tfb) / (1.0 + exp(-tp / trb));
        double mb = peak_r + bp->colour[b] + 0.05 * rng_normal(&s->r);
        o->m.bz.tau_rise[b] = (float)trb;
        o->m.bz.tau_fall[b] = (float)tfb;
        o->m.bz.amp[b] = (float)(mag_to_flux(mb) / norm);
    }
    double trr = o->m.bz.tau_rise[2], tfr = o->m.bz.tau_fall[2];
    double lead = trr * log(tfr / trr - 1.0);  /* t_peak - t0 */
    /* Phase: a new source is placed where it is already above the limit
     * (rejection, a few tries), so the slot keeps producing packets; at
     * start-up the phase spans the whole visible life. */
    double after = initial ? bp->after_peak_init : 0.3 * bp->before_peak;
    double want = 1.3 * mag_to_flux(M5_REF);
    for (int k = 0; k < 8; k++) {
        double d = uni(s, -bp->before_peak, after);  /* t - t_peak */
        o->m.bz.t_peak = t - d;
        o->m.bz.t0 = o->m.bz.t_peak - lead;
        if (bazin_rflux(o, t) >= want)
            break;
    }
}

static void spawn_periodic(sim *s, src *o)
{
    double amp = uni(s, 0.1, 0.9);
    double mean_r = M5_REF - uni(s, 1.5, 4.5);
    if (mean_r + 0.5 * amp > M5_REF - 0.8)
        mean_r = M5_REF - 0.8 - 0.5 * amp;
    float off[SIM_NBANDS];
    stellar_offsets(uni(s, 0.1, 0.9), off);
    o->m.per.period = exp(uni(s, log(0.2), log(30.0)));
    o->m.per.phase0 = rng_uniform(&s->r);
    o->m.per.sawtooth = rng_uniform(&s->r) < 0.4;
    for (unsigned b = 0; b < SIM_NBANDS; b++) {
        o->m.per.mean[b] = (float)(mean_r + off[b]);
        o->m.per.amp[b] = (float)(amp * drw_band_gain[b]);
    }
}

static void spawn_nuclear(sim *s, src *o, double t)
{
    double mean_r = M5_REF - uni(s, 1.2, 3.5);
    static const double qso_colour[SIM_NBANDS] = {0.25, 0.15, 0.0, -0.05, -0.10, -0.10};
    for (unsigned b = 0; b < SIM_NBANDS; b++)
        o->m.drw.mean[b] = (float)(mean_r + qso_colour[b] + 0.05 * rng_normal(&s->r));
    o->m.drw.tau = exp(uni(s, log(30.0), log(600.0)));
    o->m.drw.sigma = uni(s, 0.08, 0.30);
    o->m.drw.x = o->m.drw.sigma * rng_normal(&s->r);  /* stationary start */
    o->m.drw.t_last = t;
    /* The nucleus's mean brightness is at absolute magnitude -20 to -23
     * (invented range), which places its galaxy. */
    host_own(s, o, mean_r - uni(s, -23.0, -20.0), 1);
}

static void spawn_flare(sim *s, src *o)
{
    double quiet_r = M5_REF - uni(s, 1.5, 4.0);
    float off[SIM_NBANDS];
    stellar_offsets(uni(s, 1.2, 1.7), off);
    for (unsigned b = 0; b < SIM_NBANDS; b++)
        o->m.fl.quiet[b] = (float)mag_to_flux(quiet_r + off[b]);
    o->m.fl.t_peak = -1e9;
    o->m.fl.t_half = 1.0;
    o->m.fl.amp = 0.0;
}

static void spawn(sim *s, unsigned slot, double t, int initial)
{
    src *o = &s->srcs[slot];
    o->id = s->next_source_id++;
    o->hist_n = 0;
    o->hist_head = 0;
    /* A new source was not there at the field's previous visit (at the
     * start the survey has not looked yet). */
    o->nd = s->fields[slot / s->p.burst].last;
    /* Steady sources present at the start have been in the catalogue
     * since the survey began; everything else is first detected here. */
    int steady = o->pop == SIM_POP_PERIODIC || o->pop == SIM_POP_NUCLEAR ||
                 o->pop == SIM_POP_FLARE;
    o->seen = (uint8_t)(initial && steady);
    o->first_ud = o->seen ? -quant(SURVEY_AGE_DAYS, UD_PER_DAY) : 0;
    place_source(s, o, slot / s->p.burst);
    switch (o->pop) {
    case SIM_POP_PERIODIC: spawn_periodic(s, o); host_chance(s, o); break;
    case SIM_POP_NUCLEAR: spawn_nuclear(s, o, t); break;
    case SIM_POP_FLARE: spawn_flare(s, o); host_chance(s, o); break;
    case SIM_POP_MOVING:
    case SIM_POP_ARTEFACT: break;  /* drawn afresh at every visit */
    default: spawn_bazin(s, o, t, initial); break;
    }
}

/* ---- construction ----------------------------------------------------------- */

/* Detections per slot and visit, relative to an artefact slot (which emits
 * at every visit), measured over 2M packets of the default survey with
 * seeds 1 and 2.  Slots are given in proportion to target / duty so that
 * packet fractions, not slot fractions, follow the mix. */
static const double pop_duty[SIM_POP_COUNT_] = {
    0.665, 0.644, 0.985, 0.985, 0.956, 0.903, 1.0, 0.810, 0.825, 0.915};

/* Largest-remainder allocation of total slots over the population shares. */
static void allocate_slots(sim *s)
{
    double share[SIM_POP_COUNT_];
    double rsum = 0.0, msum = 0.0;
    for (unsigned i = 0; i < SIM_N_RARE; i++)
        rsum += s->p.rare_rate[i];
    for (unsigned i = 0; i < SIM_N_COMMON; i++)
        msum += s->p.mix[i];
    for (unsigned i = 0; i < SIM_N_COMMON; i++)
        share[i] = msum > 0.0 ? s->p.mix[i] / msum * (1.0 - rsum) : 0.0;
    for (unsigned i = 0; i < SIM_N_RARE; i++)
        share[SIM_N_COMMON + i] = s->p.rare_rate[i];
    double ssum = 0.0;
    for (unsigned i = 0; i < SIM_POP_COUNT_; i++)
        ssum += (share[i] /= pop_duty[i]);
    for (unsigned i = 0; i < SIM_POP_COUNT_; i++)
        share[i] /= ssum;
    unsigned given = 0;
    double rem[SIM_POP_COUNT_];
    for (unsigned i = 0; i < SIM_POP_COUNT_; i++) {
        double want = share[i] * s->n_slots;
        s->slots_of[i] = (unsigned)floor(want);
        rem[i] = want - s->slots_of[i];
        given += s->slots_of[i];
    }
    while (given < s->n_slots) {
        unsigned best = 0;
        for (unsigned i = 1; i < SIM_POP_COUNT_; i++)
            if (rem[i] > rem[best])
                best = i;
        s->slots_of[best]++;
        rem[best] = -1.0;
        given++;
    }
}

static void burn_in(sim *s, unsigned nights);

sim *sim_new(const sim_params *p, char *err, size_t errlen)
{
    if (sim_params_check(p, err, errlen) != 0)
        return NULL;
    sim *s = calloc(1, sizeof *s);
    if (!s)
        goto fail_sim;
    s->p = *p;
    rng_seed(&s->r, p->seed);
    /* Internal time 0 is the evening of the first burn-in night. */
    s->start_q = quant(p->start_mjd - (double)p->burn_in_nights, UD_PER_DAY);
    s->horizon_ud = quant(p->history_days, UD_PER_DAY);
    s->n_slots = p->n_fields * p->burst;
    s->fields = calloc(p->n_fields, sizeof *s->fields);
    if (!s->fields)
        goto fail_fields;
    s->srcs = calloc(s->n_slots, sizeof *s->srcs);
    if (!s->srcs)
        goto fail_srcs;
    s->ring = calloc((size_t)s->n_slots * p->history_max, sizeof *s->ring);
    if (!s->ring)
        goto fail_ring;
    s->visits = calloc(2u * p->n_fields, sizeof *s->visits);
    if (!s->visits)
        goto fail_visits;

    /* Fields: uniform in area between declinations -70 and +20 (invented
     * footprint); first visits staggered over three nights. */
    const double d2r = M_PI / 180.0;
    for (unsigned f = 0; f < p->n_fields; f++) {
        field *fd = &s->fields[f];
        fd->ra_deg = uni(s, 0.0, 360.0);
        fd->dec_deg = asin(uni(s, sin(-70.0 * d2r), sin(20.0 * d2r))) / d2r;
        fd->cos_dec = cos(fd->dec_deg * d2r);
        fd->next_night = (unsigned)rng_below(&s->r, 3);
    }

    /* Exact allocation of the mix, then a Fisher-Yates shuffle over the sky. */
    allocate_slots(s);
    unsigned k = 0;
    for (unsigned pop = 0; pop < SIM_POP_COUNT_; pop++)
        for (unsigned j = 0; j < s->slots_of[pop]; j++)
            s->srcs[k++].pop = (uint8_t)pop;
    for (unsigned i = s->n_slots - 1; i > 0; i--) {
        unsigned j = (unsigned)rng_below(&s->r, (uint64_t)i + 1);
        uint8_t tmp = s->srcs[i].pop;
        s->srcs[i].pop = s->srcs[j].pop;
        s->srcs[j].pop = tmp;
    }
    s->next_packet_id = 1;
    s->next_source_id = 1;
    for (unsigned i = 0; i < s->n_slots; i++)
        spawn(s, i, 0.0, 1);
    burn_in(s, p->burn_in_nights);
    return s;

fail_visits:
    free(s->ring);
fail_ring:
    free(s->srcs);
fail_srcs:
    free(s->fields);
fail_fields:
    free(s);
fail_sim:
    if (err && errlen)
        snprintf(err, errlen, "out of memory");
    return NULL;
}

void sim_free(sim *s)
{
    if (!s)
        return;
    free(s->visits);
    free(s->ring);
    free(s->srcs);
    free(s->fields);
    free(s);
}

unsigned sim_slots(const sim *s, sim_pop pop)
{
    if ((int)pop < 0 || pop >= SIM_POP_COUNT_)
        return 0;
    return s->slots_of[pop];
}

unsigned sim_night(const sim *s)
{
    unsigned b = s->p.burn_in_nights;
    return s->last_night >= b ? s->last_night - b : 0;
}

/* ---- the cadence ---------------------------------------------------------- */

static int visit_cmp(const void *a, const void *b)
{
    const visit *x = a, *y = b;
    if (x->t_ud != y->t_ud)
        return x->t_ud < y->t_ud ? -1 : 1;
    return x->field < y->field ? -1 : (x->field > y->field);
}

/* Plan nights until one has visits: each due field gets two visits 15-45
 * minutes apart in a pair of bands and is due again 2-4 nights later. */
static void plan_night(sim *s)
{
    s->n_visits = 0;
    while (s->n_visits == 0) {
        unsigned n = s->night++;
        if (rng_uniform(&s->r) >= s->p.clear_fraction)
            continue;  /* clouded out: due fields stay due */
        for (unsigned f = 0; f < s->p.n_fields; f++) {
            field *fd = &s->fields[f];
            if (fd->next_night > n)
                continue;
            double u = rng_uniform(&s->r), acc = 0.0;
            unsigned pi = 0;
            for (; pi < 6; pi++) {
                acc += pair_weight[pi];
                if (u < acc)
                    break;
            }
            int swap = rng_uniform(&s->r) < 0.5;
            double t1 = n + uni(s, 0.0, 0.28);
            double t2 = t1 + uni(s, 15.0, 45.0) / 1440.0;
            visit *v = &s->visits[s->n_visits++];
            v->t_ud = quant(t1, UD_PER_DAY);
            v->field = f;
            v->band = pair_band[pi][swap];
            v = &s->visits[s->n_visits++];
            v->t_ud = quant(t2, UD_PER_DAY);
            v->field = f;
            v->band = pair_band[pi][!swap];
            fd->next_night = n + 2 + (unsigned)rng_below(&s->r, 3);
        }
        s->last_night = n;
    }
    qsort(s->visits, s->n_visits, sizeof *s->visits, visit_cmp);
    s->vi = 0;
    s->si = 0;
}

/* ---- one slot at one visit ------------------------------------------------ */

static void fill_common(sim *s, src *o, const visit *v, sim_packet *out)
{
    if (!o->seen) {
        o->seen = 1;
        o->first_ud = v->t_ud;
    }
    out->first_mjd = (double)(s->start_q + o->first_ud) / UD_PER_DAY;
    out->packet_id = s->next_packet_id++;
    out->source_id = o->id;
    out->ra_deg = (double)o->ra_q / 1e6;
    out->dec_deg = (double)o->dec_q / 1e6;
    out->mjd = (double)(s->start_q + v->t_ud) / UD_PER_DAY;
    out->band = v->band;
    out->field = (int32_t)v->field;
    out->truth = (sim_pop)o->pop;
    out->n_hist = 0;
    out->has_limit = o->nd.valid && o->nd.t_ud < v->t_ud &&
                     v->t_ud - o->nd.t_ud <= s->horizon_ud;
    out->limit_mjd = out->limit_mag = 0.0;
    out->limit_band = 0;
    if (out->has_limit) {
        out->limit_mjd = (double)(s->start_q + o->nd.t_ud) / UD_PER_DAY;
        out->limit_mag = (double)o->nd.m5_q / 1e4;
        out->limit_band = o->nd.band;
    }
    /* Known moving bodies: 85% of the moving objects are known, their
     * predicted positions off by a Rayleigh 0.7 arcsec; any other source
     * lies near a known body by chance once in 500 (invented rates). */
    double sep = SIM_MOVER_RADIUS, u = rng_uniform(&s->r);
    if (o->pop == SIM_POP_MOVING ? u < 0.85 : u < 0.002) {
        double w = rng_uniform(&s->r);
        sep = o->pop == SIM_POP_MOVING ? 0.7 * sqrt(-2.0 * log1p(-w))
                                       : SIM_MOVER_RADIUS * sqrt(w);
        if (sep > SIM_MOVER_RADIUS)
            sep = SIM_MOVER_RADIUS;
    }
    out->mover_sep_arcsec = (double)quant(sep, 1e4) / 1e4;
    out->has_host = o->has_host;
    out->host_sep_arcsec = o->has_host ? (double)quant(o->host_sep, 1e4) / 1e4 : 0.0;
    out->host_dist_mod = o->has_host ? (double)quant(o->host_mu, 1e4) / 1e4 : 0.0;
}

/* Record visit v (at the current limit) as a visit without a detection. */
static void note_visit(const sim *s, const visit *v, nondet *nd)
{
    nd->t_ud = v->t_ud;
    nd->m5_q = (int32_t)quant(s->cur_m5, 1e4);
    nd->band = v->band;
    nd->valid = 1;
}

static void set_phot(sim_packet *out, double mag, double err, double quality)
{
    if (err > 6.5)
        err = 6.5;
    if (err < 1e-4)
        err = 1e-4;
    if (quality < 0.0)
        quality = 0.0;
    if (quality > 1.0)
        quality = 1.0;
    out->mag = (double)quant(mag, 1e4) / 1e4;
    out->mag_err = (double)quant(err, 1e4) / 1e4;
    out->quality = (double)quant(quality, 1e4) / 1e4;
}

/* Sky-limited measurement of a true flux; 1 when detected at SNR >= 5. */
static int measure(sim *s, double flux, sim_packet *out)
{
    double sigma = mag_to_flux(s->cur_m5) / 5.0;
    double fobs = flux + sigma * rng_normal(&s->r);
    if (!(fobs >= 5.0 * sigma))
        return 0;
    double snr = fobs / sigma;
    double e = POGSON / snr;
    double err = sqrt(e * e + ERR_FLOOR * ERR_FLOOR);
    double q = 0.97 - 0.35 * (5.0 / snr) * rng_uniform(&s->r) -
               0.03 * fabs(rng_normal(&s->r));
    set_phot(out, flux_to_mag(fobs), err, q);
    return 1;
}

static void copy_history(sim *s, unsigned slot, const src *o, int64_t t_ud,
                         sim_packet *out)
{
    unsigned hmax = s->p.history_max;
    const hist_entry *ring = &s->ring[(size_t)slot * hmax];
    unsigned n = o->hist_n;
    unsigned start = (o->hist_head + hmax - n) % hmax;
    unsigned k = 0;
    for (unsigned i = 0; i < n; i++) {
        const hist_entry *h = &ring[(start + i) % hmax];
        if (h->t_ud < t_ud - s->horizon_ud)
            continue;
        sim_point *pt = &out->hist[k++];
        pt->mjd = (double)(s->start_q + h->t_ud) / UD_PER_DAY;
        pt->mag = (double)h->mag_q / 1e4;
        pt->mag_err = (double)h->err_q / 1e4;
        pt->band = h->band;
    }
    out->n_hist = k;
}

static void push_history(sim *s, unsigned slot, src *o, int64_t t_ud,
                         const sim_packet *p)
{
    unsigned hmax = s->p.history_max;
    hist_entry *h = &s->ring[(size_t)slot * hmax + o->hist_head];
    h->t_ud = t_ud;
    h->mag_q = (int32_t)quant(p->mag, 1e4);
    h->err_q = (uint16_t)quant(p->mag_err, 1e4);
    h->band = p->band;
    o->hist_head = (uint16_t)((o->hist_head + 1) % hmax);
    if (o->hist_n < hmax)
        o->hist_n++;
}

static int emit_artefact(sim *s, src *o, unsigned slot, const visit *v,
                         sim_packet *out)
{
    /* Invented failure modes: a bad subtraction near the limit with a
     * large error, a cosmic-ray-like hit with an error too small for its
     * brightness, a ghost of a bright star. */
    o->id = s->next_source_id++;
    o->nd = s->fields[slot / s->p.burst].last;
    o->seen = 0;
    place_source(s, o, slot / s->p.burst);
    host_chance(s, o);
    fill_common(s, o, v, out);
    double m5 = s->cur_m5, u = rng_uniform(&s->r), mag, err, q;
    if (u < 0.5) {
        mag = uni(s, m5 - 1.5, m5 + 0.3);
        err = uni(s, 0.15, 0.6);
        q = uni(s, 0.0, 0.45);
    } else if (u < 0.8) {
        mag = uni(s, 16.0, m5 - 1.0);
        err = uni(s, 0.005, 0.03);
        q = uni(s, 0.05, 0.5);
    } else {
        mag = uni(s, 11.0, 15.0);
        err = uni(s, 0.001, 0.01);
        q = uni(s, 0.1, 0.6);
    }
    set_phot(out, mag, err, q);
    return 1;
}

static int emit_slot(sim *s, unsigned slot, const visit *v, sim_packet *out)
{
    src *o = &s->srcs[slot];
    double t = s->cur_t;
    unsigned b = v->band;
    double flux;

    switch (o->pop) {
    case SIM_POP_ARTEFACT:
        return emit_artefact(s, o, slot, v, out);
    case SIM_POP_MOVING: {
        /* A new body at every visit: never linked, so no history. */
        o->id = s->next_source_id++;
        o->nd = s->fields[slot / s->p.burst].last;
        o->seen = 0;
        place_source(s, o, slot / s->p.burst);
        host_chance(s, o);
        float off[SIM_NBANDS];
        stellar_offsets(0.45 + 0.08 * rng_normal(&s->r), off);
        double mr = M5_REF - uni(s, 0.2, 3.2);
        flux = mag_to_flux(mr + off[b]);
        if (!measure(s, flux, out))
            return 0;
        fill_common(s, o, v, out);
        return 1;
    }
    case SIM_POP_PERIODIC: {
        double ph = t / o->m.per.period + o->m.per.phase0;
        ph -= floor(ph);
        double shape;
        if (o->m.per.sawtooth)  /* fast rise over 15% of the cycle, slow decline */
            shape = ph < 0.15 ? 0.5 - ph / 0.15 : -0.5 + (ph - 0.15) / 0.85;
        else
            shape = 0.5 * sin(2.0 * M_PI * ph);
        flux = mag_to_flux(o->m.per.mean[b] + o->m.per.amp[b] * shape);
        break;
    }
    case SIM_POP_NUCLEAR: {
        double dt = t - o->m.drw.t_last;
        if (dt > 0.0) {
            o->m.drw.x = sim_drw_step(o->m.drw.x, 0.0, o->m.drw.tau,
                                      o->m.drw.sigma, dt, rng_normal(&s->r));
            o->m.drw.t_last = t;
        }
        flux = mag_to_flux(o->m.drw.mean[b] + drw_band_gain[b] * o->m.drw.x);
        break;
    }
    case SIM_POP_FLARE: {
        /* Between visits a flare starts with probability 0.12 when none is
         * running; its peak falls shortly before or at the visit. */
        if ((t - o->m.fl.t_peak) / o->m.fl.t_half > 30.0 &&
            rng_uniform(&s->r) < 0.12) {
            o->m.fl.t_half = uni(s, 5.0, 40.0) / 1440.0;
            o->m.fl.t_peak = t - o->m.fl.t_half * uni(s, -0.5, 6.0);
            o->m.fl.amp = exp(log(1.5) + 0.8 * rng_normal(&s->r));
        }
        double rel = sim_flare_template((t - o->m.fl.t_peak) / o->m.fl.t_half);
        flux = o->m.fl.quiet[b] * (1.0 + o->m.fl.amp * flare_band_gain[b] * rel);
        break;
    }
    default: {
        const bazin_pop *bp = &bazin_table[o->pop];
        if (t > o->m.bz.t_peak &&
            (bazin_rflux(o, t) < 0.75 * mag_to_flux(M5_REF) ||
             t - o->m.bz.t_peak > bp->max_life))
            spawn(s, slot, t, 0);
        flux = o->m.bz.amp[b] * sim_bazin_flux(t, 1.0, 0.0, o->m.bz.t0,
                                               o->m.bz.tau_rise[b],
                                               o->m.bz.tau_fall[b]);
        break;
    }
    }
    if (!measure(s, flux, out)) {
        note_visit(s, v, &o->nd);  /* the visit did not detect it */
        return 0;
    }
    fill_common(s, o, v, out);
    copy_history(s, slot, o, v->t_ud, out);
    push_history(s, slot, o, v->t_ud, out);
    return 1;
}

/* Go on with the current visit: 1 with a packet in *out, 0 when the visit
 * is done (the next call starts the next visit, which must exist). */
static int visit_step(sim *s, sim_packet *out)
{
    const visit *v = &s->visits[s->vi];
    if (s->si == 0) {
        /* Seeing and sky move the visit's limit (invented spread). */
        double j = 0.2 * rng_normal(&s->r);
        if (j > 0.6) j = 0.6;
        if (j < -0.6) j = -0.6;
        s->cur_m5 = band_m5[v->band] + j;
        s->cur_t = (double)v->t_ud / UD_PER_DAY;
    }
    while (s->si < s->p.burst) {
        unsigned slot = v->field * s->p.burst + s->si++;
        if (emit_slot(s, slot, v, out))
            return 1;
    }
    /* Later packets of this field see this visit as its previous one. */
    note_visit(s, v, &s->fields[v->field].last);
    s->vi++;
    s->si = 0;
    return 0;
}

int sim_next(sim *s, sim_packet *out)
{
    for (;;) {
        if (s->vi >= s->n_visits)
            plan_night(s);
        if (visit_step(s, out))
            return 0;
    }
}

/* Run the survey through its first `nights` nights without emitting, so
 * the first packet comes from a survey in its stride: histories and prior
 * limits filled, transients at every phase.  Stops before the first visit
 * of night `nights` or later (clouded nights are skipped as usual). */
static void burn_in(sim *s, unsigned nights)
{
    sim_packet tmp;
    if (nights == 0)
        return;
    for (;;) {
        if (s->vi >= s->n_visits) {
            if (s->night >= nights)
                break;
            plan_night(s);
            if (s->last_night >= nights)
                break;  /* its visits are still to come */
        }
        while (visit_step(s, &tmp))
            ;
    }
    s->next_packet_id = 1;
}

/* ---- encoders --------------------------------------------------------------- */

/* Fixed-point decimal of k / 10^dec with trailing zeros trimmed (one
 * fractional digit kept), so the text parses back to the quantised value. */
static char *put_fixed(char *o, int64_t k, int dec)
{
    static const int64_t pow10[] = {1, 10, 100, 1000, 10000, 100000, 1000000};
    uint64_t u;
    if (k < 0) {
        *o++ = '-';
        u = (uint64_t)(-(k + 1)) + 1u;
    } else {
        u = (uint64_t)k;
    }
    uint64_t ip = u / (uint64_t)pow10[dec], fp = u % (uint64_t)pow10[dec];
    char tmp[24];
    int n = 0;
    do {
        tmp[n++] = (char)('0' + ip % 10);
        ip /= 10;
    } while (ip);
    while (n)
        *o++ = tmp[--n];
    *o++ = '.';
    char fr[8];
    for (int i = dec - 1; i >= 0; i--) {
        fr[i] = (char)('0' + fp % 10);
        fp /= 10;
    }
    int last = dec - 1;
    while (last > 0 && fr[last] == '0')
        last--;
    for (int i = 0; i <= last; i++)
        *o++ = fr[i];
    return o;
}

static char *put_int(char *o, int64_t k)
{
    uint64_t u;
    if (k < 0) {
        *o++ = '-';
        u = (uint64_t)(-(k + 1)) + 1u;
    } else {
        u = (uint64_t)k;
    }
    char tmp[24];
    int n = 0;
    do {
        tmp[n++] = (char)('0' + u % 10);
        u /= 10;
    } while (u);
    while (n)
        *o++ = tmp[--n];
    return o;
}

static char *put_lit(char *o, const char *s)
{
    size_t n = strlen(s);
    memcpy(o, s, n);
    return o + n;
}

static char *put_dbl(char *o, double v, int dec, double scale)
{
    return put_fixed(o, quant(v, scale), dec);
}

static int band_ok(unsigned b)
{
    return b < SIM_NBANDS;
}

int sim_encode_json(const sim_packet *p, char *buf, size_t cap)
{
    /* Every number below is at most 26 characters: a conservative bound
     * checked once up front keeps the writers free of per-byte checks. */
    if (p->n_hist > SIM_HISTORY_CAP || !band_ok(p->band) ||
        (int)p->truth < 0 || p->truth >= SIM_POP_COUNT_)
        return -1;
    size_t need = 660 + (size_t)p->n_hist * 110;
    if (cap < need)
        return -1;
    char *o = buf;
    o = put_lit(o, "{\"packet_id\":");
    o = put_int(o, p->packet_id);
    o = put_lit(o, ",\"source\":{\"id\":");
    o = put_int(o, p->source_id);
    o = put_lit(o, ",\"ra_deg\":");
    o = put_dbl(o, p->ra_deg, 6, 1e6);
    o = put_lit(o, ",\"dec_deg\":");
    o = put_dbl(o, p->dec_deg, 6, 1e6);
    o = put_lit(o, ",\"first_mjd\":");
    o = put_dbl(o, p->first_mjd, 6, 1e6);
    o = put_lit(o, "},\"obs\":{\"mjd\":");
    o = put_dbl(o, p->mjd, 6, 1e6);
    o = put_lit(o, ",\"band\":\"");
    *o++ = band_letter[p->band][0];
    o = put_lit(o, "\",\"mag\":");
    o = put_dbl(o, p->mag, 4, 1e4);
    o = put_lit(o, ",\"mag_err\":");
    o = put_dbl(o, p->mag_err, 4, 1e4);
    o = put_lit(o, ",\"quality\":");
    o = put_dbl(o, p->quality, 4, 1e4);
    o = put_lit(o, ",\"field\":");
    o = put_int(o, p->field);
    o = put_lit(o, ",\"mover_sep_arcsec\":");
    o = put_dbl(o, p->mover_sep_arcsec, 4, 1e4);
    o = put_lit(o, "},\"history\":[");
    for (unsigned i = 0; i < p->n_hist; i++) {
        const sim_point *h = &p->hist[i];
        if (!band_ok(h->band))
            return -1;
        o = put_lit(o, i ? ",{\"mjd\":" : "{\"mjd\":");
        o = put_dbl(o, h->mjd, 6, 1e6);
        o = put_lit(o, ",\"band\":\"");
        *o++ = band_letter[h->band][0];
        o = put_lit(o, "\",\"mag\":");
        o = put_dbl(o, h->mag, 4, 1e4);
        o = put_lit(o, ",\"mag_err\":");
        o = put_dbl(o, h->mag_err, 4, 1e4);
        *o++ = '}';
    }
    if (p->has_limit) {
        if (!band_ok(p->limit_band))
            return -1;
        o = put_lit(o, "],\"prior_limit\":{\"mjd\":");
        o = put_dbl(o, p->limit_mjd, 6, 1e6);
        o = put_lit(o, ",\"band\":\"");
        *o++ = band_letter[p->limit_band][0];
        o = put_lit(o, "\",\"mag\":");
        o = put_dbl(o, p->limit_mag, 4, 1e4);
        o = put_lit(o, "}");
    } else {
        o = put_lit(o, "],\"prior_limit\":null");
    }
    if (p->has_host) {
        o = put_lit(o, ",\"host\":{\"sep_arcsec\":");
        o = put_dbl(o, p->host_sep_arcsec, 4, 1e4);
        o = put_lit(o, ",\"dist_mod\":");
        o = put_dbl(o, p->host_dist_mod, 4, 1e4);
        o = put_lit(o, "},\"truth\":\"");
    } else {
        o = put_lit(o, ",\"host\":null,\"truth\":\"");
    }
    o = put_lit(o, sim_pop_name(p->truth));
    o = put_lit(o, "\"}");
    return (int)(o - buf);
}

/* Avro binary encoding (Avro 1.11 specification, "Binary Encoding"):
 * int and long are zig-zag varints, double is 8 bytes little-endian,
 * string is a long length then UTF-8 bytes, an array is blocks of
 * (count, items) ended by a zero count, an enum is its index as an int. */
static uint8_t *av_long(uint8_t *o, int64_t v)
{
    uint64_t z = ((uint64_t)v << 1) ^ (uint64_t)(v >> 63);
    while (z >= 0x80) {
        *o++ = (uint8_t)(z | 0x80);
        z >>= 7;
    }
    *o++ = (uint8_t)z;
    return o;
}

static uint8_t *av_double(uint8_t *o, double d)
{
    uint64_t u;
    memcpy(&u, &d, 8);
    for (int i = 0; i < 8; i++)
        o[i] = (uint8_t)(u >> (8 * i));
    return o + 8;
}

static uint8_t *av_band(uint8_t *o, unsigned b)
{
    *o++ = 2;  /* length 1, zig-zag */
    *o++ = (uint8_t)band_letter[b][0];
    return o;
}

static uint8_t *av_bytes(uint8_t *o, const void *s, size_t n)
{
    o = av_long(o, (int64_t)n);
    memcpy(o, s, n);
    return o + n;
}

static int avro_body(const sim_packet *p, uint8_t *buf, size_t cap)
{
    if (p->n_hist > SIM_HISTORY_CAP || !band_ok(p->band) ||
        (int)p->truth < 0 || p->truth >= SIM_POP_COUNT_)
        return -1;
    size_t need = 180 + (size_t)p->n_hist * 26;
    if (cap < need)
        return -1;
    uint8_t *o = buf;
    o = av_long(o, p->packet_id);
    o = av_long(o, p->source_id);
    o = av_double(o, p->ra_deg);
    o = av_double(o, p->dec_deg);
    o = av_double(o, p->first_mjd);
    o = av_double(o, p->mjd);
    o = av_band(o, p->band);
    o = av_double(o, p->mag);
    o = av_double(o, p->mag_err);
    o = av_double(o, p->quality);
    o = av_long(o, p->field);
    o = av_double(o, p->mover_sep_arcsec);
    if (p->n_hist) {
        o = av_long(o, (int64_t)p->n_hist);
        for (unsigned i = 0; i < p->n_hist; i++) {
            const sim_point *h = &p->hist[i];
            if (!band_ok(h->band))
                return -1;
            o = av_double(o, h->mjd);
            o = av_band(o, h->band);
            o = av_double(o, h->mag);
            o = av_double(o, h->mag_err);
        }
    }
    o = av_long(o, 0);
    if (p->has_limit) {  /* union ["null", Limit]: branch index, then the record */
        if (!band_ok(p->limit_band))
            return -1;
        o = av_long(o, 1);
        o = av_double(o, p->limit_mjd);
        o = av_band(o, p->limit_band);
        o = av_double(o, p->limit_mag);
    } else {
        o = av_long(o, 0);
    }
    if (p->has_host) {  /* union ["null", Host] */
        o = av_long(o, 1);
        o = av_double(o, p->host_sep_arcsec);
        o = av_double(o, p->host_dist_mod);
    } else {
        o = av_long(o, 0);
    }
    o = av_long(o, (int64_t)p->truth);
    return (int)(o - buf);
}

int sim_encode_avro(const sim_packet *p, uint8_t *buf, size_t cap)
{
    return avro_body(p, buf, cap);
}

int sim_encode_schema_id(const sim_packet *p, uint32_t schema_id,
                         uint8_t *buf, size_t cap)
{
    if (cap < 5)
        return -1;
    buf[0] = 0;
    buf[1] = (uint8_t)(schema_id >> 24);
    buf[2] = (uint8_t)(schema_id >> 16);
    buf[3] = (uint8_t)(schema_id >> 8);
    buf[4] = (uint8_t)schema_id;
    int n = avro_body(p, buf + 5, cap - 5);
    return n < 0 ? -1 : n + 5;
}

int sim_container_header(const uint8_t sync[16], uint8_t *buf, size_t cap)
{
    /* Avro 1.11 specification, "Object Container Files": the magic
     * 'O' 'b' 'j' 1, the file metadata as a map<bytes>, the sync marker. */
    size_t slen = sizeof sim_schema_text - 1;
    if (cap < slen + 64)
        return -1;
    uint8_t *o = buf;
    memcpy(o, "Obj\x01", 4);
    o += 4;
    o = av_long(o, 2);
    o = av_bytes(o, "avro.codec", 10);
    o = av_bytes(o, "null", 4);
    o = av_bytes(o, "avro.schema", 11);
    o = av_bytes(o, sim_schema_text, slen);
    o = av_long(o, 0);
    memcpy(o, sync, 16);
    o += 16;
    return (int)(o - buf);
}

int sim_container_block(long count, const uint8_t *data, size_t len,
                        const uint8_t sync[16], uint8_t *buf, size_t cap)
{
    if (count < 1 || cap < len + 36 || len > (size_t)INT32_MAX - 64)
        return -1;
    uint8_t *o = buf;
    o = av_long(o, count);
    o = av_long(o, (int64_t)len);
    memmove(o, data, len);
    o += len;
    memcpy(o, sync, 16);
    o += 16;
    return (int)(o - buf);
}

int sim_encode_container(const sim_packet *p, const uint8_t sync[16],
                         uint8_t *buf, size_t cap)
{
    uint8_t datum[SIM_AVRO_MAX];
    int h = sim_container_header(sync, buf, cap);
    if (h < 0)
        return -1;
    int n = avro_body(p, datum, sizeof datum);
    if (n < 0)
        return -1;
    int b = sim_container_block(1, datum, (size_t)n, sync, buf + h,
                                cap - (size_t)h);
    return b < 0 ? -1 : h + b;
}

void sim_sync_marker(uint64_t seed, uint8_t sync[16])
{
    uint64_t st = seed ^ 0x6f6464736b790000ULL;  /* "oddsky" */
    for (int i = 0; i < 2; i++) {
        uint64_t v = rng_splitmix64(&st);
        for (int j = 0; j < 8; j++)
            sync[8 * i + j] = (uint8_t)(v >> (8 * j));
    }
}
