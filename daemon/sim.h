/*
 * sim.h - the invented demo survey: a seeded generator of alert packets.
 *
 * The demo survey is our own invention (schema oddsky.demo.Packet in
 * config/schemas/oddsky-demo-packet.avsc).  The sky is cut into fields;
 * each clear night the fields that are due get two visits 15-45 minutes
 * apart in two different bands and are due again 2-4 nights later.  Every
 * field holds `burst` source slots, so a visit yields about `burst`
 * packets, all stamped with the visit time.  A slot's population is fixed
 * when the generator is built (the mix is allocated exactly over all slots
 * by largest remainder, then shuffled over the fields), so the packet mix
 * follows the requested fractions up to detection losses; a transient slot
 * re-spawns a new source of its population when the old one has faded.
 *
 * Light curves: supernova-like and the three rare populations follow the
 * rise/fall form of Bazin et al. 2009 with per-band time scales and
 * colours; periodic variables are sinusoids or sawtooths; nuclear sources
 * a damped random walk (the exact Ornstein-Uhlenbeck update, Kelly,
 * Bechtold & Siemiginowska 2009); flare stars a quiescent star plus the
 * flare template of Davenport et al. 2014; moving objects and imaging
 * artefacts never repeat, so they carry no history.  Each packet also
 * carries the latest earlier visit of its position that did not detect
 * the source (its time, band and limiting magnitude: a new source's is
 * the field's previous visit) and the separation from the nearest known
 * moving body (most moving objects are known bodies; other sources
 * rarely fall near one by chance) and the source's first detection in the
 * survey (steady sources present at the start count from a survey begun
 * long before).  Unless burn_in_nights is 0, the survey runs that many
 * nights unseen before the first packet, so packet 1 already has full
 * histories and prior limits.  Photometry is
 * sky-limited: the flux error is constant for a visit, set by its 5-sigma
 * limiting magnitude, and a packet exists only for a detection at
 * SNR >= 5.
 *
 * Invariants:
 * - Determinism: the same params (seed included) give the same packets,
 *   bit for bit, and the encoders are pure functions of the packet.
 * - Event time never decreases from one sim_next() to the next; history
 *   points are strictly earlier than the packet, oldest first, at most
 *   history_max of them and none older than history_days.
 * - Every value is quantised at generation (times to 1e-6 day, positions
 *   to 1e-6 degree, magnitudes, errors and quality to 1e-4), so the JSON
 *   text of a packet parses back to exactly the doubles in sim_packet.
 * - All memory is allocated by sim_new(); sim_next() and the encoders
 *   allocate nothing.
 * - The `truth` population is for evaluation only; no feature may use it.
 */
#ifndef ODDSKY_DAEMON_SIM_H
#define ODDSKY_DAEMON_SIM_H

#include <stddef.h>
#include <stdint.h>

#define SIM_HISTORY_CAP 64u  /* hard bound on history_max */
#define SIM_NBANDS 6u
#define SIM_MOVER_RADIUS 60.0  /* arcsec searched for a known moving body */
#define SIM_HOST_RADIUS 10.0   /* arcsec searched for a catalogued galaxy */

/* X(enum suffix, name in the schema's Population enum) */
#define SIM_POP_MAP(X)                                                        \
    X(SN_THERMO, "sn_thermo")                                                 \
    X(SN_CC, "sn_cc")                                                         \
    X(PERIODIC, "periodic")                                                   \
    X(NUCLEAR, "nuclear_drw")                                                 \
    X(FLARE, "flare")                                                         \
    X(MOVING, "moving")                                                       \
    X(ARTEFACT, "artefact")                                                   \
    X(FAST_BLUE, "rare_fast_blue")                                            \
    X(FAST_RED, "rare_fast_red")                                              \
    X(SLOW_RISER, "rare_slow_riser")

typedef enum sim_pop {
#define SIM_POP_ENUM(sym, name) SIM_POP_##sym,
    SIM_POP_MAP(SIM_POP_ENUM)
#undef SIM_POP_ENUM
    SIM_POP_COUNT_
} sim_pop;

#define SIM_POP_FIRST_RARE SIM_POP_FAST_BLUE
#define SIM_N_COMMON ((unsigned)SIM_POP_FIRST_RARE)
#define SIM_N_RARE ((unsigned)SIM_POP_COUNT_ - SIM_N_COMMON)

typedef struct sim_params {
    uint64_t seed;
    double start_mjd;          /* evening of the first emitted night */
    unsigned n_fields;         /* fields on the sky (default 500) */
    unsigned burst;            /* source slots per field ~ packets per visit */
    unsigned history_max;      /* past detections per packet, <= 64 */
    double history_days;       /* history horizon (default 30) */
    double clear_fraction;     /* fraction of nights with usable sky */
    unsigned burn_in_nights;   /* nights run, unseen, before start_mjd (default
                                * 30, the history horizon): the first packet
                                * comes from a survey already in its stride */
    /* Relative weights of the common populations (normalised; default
     * sn_thermo .12, sn_cc .10, periodic .25, nuclear .20, flare .10,
     * moving .13, artefact .10). */
    double mix[SIM_N_COMMON];
    /* Fraction of all packets from each rare population (default 5e-4
     * each); the common ones share the rest.  Rates below
     * 1 / (n_fields * burst) round to zero or one slot. */
    double rare_rate[SIM_N_RARE];
} sim_params;

/* One detection in a packet's history. */
typedef struct sim_point {
    double mjd;
    double mag;
    double mag_err;
    uint8_t band;  /* 0..5 = u g r i z y */
} sim_point;

typedef struct sim_packet {
    int64_t packet_id;   /* 1, 2, 3 ... in emission order */
    int64_t source_id;   /* stable for a source across its packets */
    double ra_deg, dec_deg;
    double first_mjd;    /* the source's first detection in the survey */
    double mjd;          /* visit time */
    uint8_t band;
    double mag, mag_err;
    double quality;      /* 0 (junk) .. 1 (clean) */
    int32_t field;
    double mover_sep_arcsec; /* nearest known moving body, SIM_MOVER_RADIUS if none */
    sim_pop truth;
    unsigned n_hist;
    sim_point hist[SIM_HISTORY_CAP];
    /* The latest earlier visit of the position without a detection of the
     * source, within the history horizon (has_limit 0: none, null in the
     * encodings). */
    int has_limit;
    double limit_mjd, limit_mag;  /* limit_mag: that visit's 5-sigma limit */
    uint8_t limit_band;
    /* The nearest catalogued galaxy within SIM_HOST_RADIUS (has_host 0:
     * none, null in the encodings): separation and the distance modulus
     * of its photometric redshift. */
    int has_host;
    double host_sep_arcsec, host_dist_mod;
} sim_packet;

typedef struct sim sim;

/* Defaults as documented in the struct. */
void sim_params_default(sim_params *p);

/* 0 when the params are usable, else -1 with a reason in err (if non-NULL). */
int sim_params_check(const sim_params *p, char *err, size_t errlen);

/* Build a generator.  Returns NULL when the params fail sim_params_check
 * (reason in err) or on allocation failure.  Owned by the caller. */
sim *sim_new(const sim_params *p, char *err, size_t errlen);

/* Release a generator (NULL is allowed). */
void sim_free(sim *s);

/* Fill *out with the next packet in event-time order.  Always succeeds
 * (the survey never ends); returns 0. */
int sim_next(sim *s, sim_packet *out);

/* Slots given to each population (the exact allocation of the mix). */
unsigned sim_slots(const sim *s, sim_pop pop);

/* Nights simulated so far (the night of the last packet, from 0). */
unsigned sim_night(const sim *s);

/* Name of a population as in the schema ("?" when out of range). */
const char *sim_pop_name(int pop);

/* Band letter ("?" when out of range). */
const char *sim_band_name(int band);

/* The Avro schema of the packets (the same record as the .avsc file),
 * NUL-terminated, static storage. */
const char *sim_schema_json(void);

/* --- encoders: each returns the number of bytes written, or -1 when cap
 * is too small (nothing useful is left in buf then).  None allocates. --- */

#define SIM_JSON_MAX 8192u       /* enough for any packet as JSON */
#define SIM_AVRO_MAX 2048u       /* enough for any bare Avro datum */
#define SIM_CONTAINER_MAX 8192u  /* enough for a one-packet container */

/* One JSON object, no newline, no NUL (keys as in the schema). */
int sim_encode_json(const sim_packet *p, char *buf, size_t cap);

/* Bare Avro binary datum of the schema (Avro 1.11 spec, binary encoding),
 * hand-encoded. */
int sim_encode_avro(const sim_packet *p, uint8_t *buf, size_t cap);

/* Schema-id framing: 0x00, the 4-byte big-endian schema id, bare Avro. */
int sim_encode_schema_id(const sim_packet *p, uint32_t schema_id,
                         uint8_t *buf, size_t cap);

/* Object container header (magic, metadata avro.schema and
 * avro.codec=null, the 16-byte sync marker). */
int sim_container_header(const uint8_t sync[16], uint8_t *buf, size_t cap);

/* One container data block: object count, byte size, the `len` bytes of
 * concatenated bare datums in `data`, then the sync marker. */
int sim_container_block(long count, const uint8_t *data, size_t len,
                        const uint8_t sync[16], uint8_t *buf, size_t cap);

/* A complete object container holding just this packet. */
int sim_encode_container(const sim_packet *p, const uint8_t sync[16],
                         uint8_t *buf, size_t cap);

/* A sync marker derived from a seed (deterministic output files). */
void sim_sync_marker(uint64_t seed, uint8_t sync[16]);

/* --- light-curve models, exposed for the unit tests --- */

/* Bazin et al. 2009, eq. 1:
 *   f(t) = A exp(-(t - t0)/tau_fall) / (1 + exp(-(t - t0)/tau_rise)) + B */
double sim_bazin_flux(double t, double a, double b, double t0,
                      double tau_rise, double tau_fall);

/* Time of the maximum of the Bazin form (tau_fall > tau_rise > 0):
 *   t_max = t0 + tau_rise ln(tau_fall / tau_rise - 1). */
double sim_bazin_t_peak(double t0, double tau_rise, double tau_fall);

/* Exact Ornstein-Uhlenbeck (damped random walk) step, Kelly et al. 2009:
 *   x' = mean + (x - mean) e^{-dt/tau} + sigma_inf sqrt(1 - e^{-2dt/tau}) z
 * with z a standard normal deviate and sigma_inf the stationary std. */
double sim_drw_step(double x, double mean, double tau, double sigma_inf,
                    double dt, double z);

/* Davenport et al. 2014 flare template, relative flux at time t in units
 * of the flare's half-width t_1/2 after the peak (0 before t = -1). */
double sim_flare_template(double t_half_units);

/* Sky-limited magnitude error for a magnitude m on a visit whose 5-sigma
 * limit is m5: 2.5/ln(10) / SNR with SNR = 5 * 10^(-0.4 (m - m5)). */
double sim_mag_err(double m, double m5);

#endif
