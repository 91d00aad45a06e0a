/*
 * test_sim.c - the demo survey generator and its encoders.
 *
 * Light-curve models against their published formulas evaluated by hand
 * (Python's math module on the paper's equation, values pasted below);
 * determinism, event-time order, history bounds and consistency; packet
 * rates against the requested mix; JSON decoded with jansson and Avro
 * (bare, schema-id, container) decoded with avro-c against the schema
 * file; the demo feature map against the project's feature-map parser.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include <avro.h>
#include <jansson.h>

#include "core/rng.h"
#include "daemon/featmap.h"
#include "daemon/sim.h"

#define SCHEMA_PATH "config/schemas/oddsky-demo-packet.avsc"
#define FEATMAP_PATH "config/demo-featmap.json"

static void assert_close(double got, double want, double tol, const char *what)
{
    if (!(fabs(got - want) <= tol)) {
        print_error("%s: got %.17g, want %.17g (tol %g)\n", what, got, want, tol);
        fail();
    }
}

static char *slurp(const char *path, size_t *len)
{
    FILE *f = fopen(path, "rb");
    if (!f) {
        print_error("cannot open %s (run the tests from the repository root)\n", path);
        return NULL;
    }
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    char *b = malloc((size_t)n + 1);
    if (b && fread(b, 1, (size_t)n, f) != (size_t)n) {
        free(b);
        b = NULL;
    }
    fclose(f);
    if (b) {
        b[n] = 0;
        if (len)
            *len = (size_t)n;
    }
    return b;
}

static avro_schema_t load_schema(void)
{
    size_t n;
    char *txt = slurp(SCHEMA_PATH, &n);
    assert_non_null(txt);
    avro_schema_t sc = NULL;
    avro_schema_error_t e;
    if (avro_schema_from_json(txt, (int32_t)n, &sc, &e) != 0) {
        print_error("schema: %s\n", avro_strerror());
        fail();
    }
    free(txt);
    return sc;
}

/* ---- light-curve models ------------------------------------------------ */

static void test_bazin_formula(void **state)
{
    (void)state;
    /* source: Bazin et al. 2009, A&A 499, 653, eq. 1,
     * f = A e^{-(t-t0)/tf} / (1 + e^{-(t-t0)/tr}) + B, evaluated with
     * Python math: A=2 B=0.5 t0=10 tr=3 tf=20 at t=15. */
    assert_close(sim_bazin_flux(15.0, 2.0, 0.5, 10.0, 3.0, 20.0),
                 1.81014679956859, 1e-13, "bazin t=15");
    /* A=1.5 B=0 t0=2 tr=2.5 tf=30 at t=-4 (on the rise). */
    assert_close(sim_bazin_flux(-4.0, 1.5, 0.0, 2.0, 2.5, 30.0),
                 0.15238104135194322, 1e-13, "bazin t=-4");
    /* Far from t0 the form falls to B on both sides. */
    assert_close(sim_bazin_flux(-500.0, 1.0, 0.25, 0.0, 2.0, 20.0), 0.25, 1e-9, "B before");
    assert_close(sim_bazin_flux(2000.0, 1.0, 0.25, 0.0, 2.0, 20.0), 0.25, 1e-9, "B after");
    /* Maximum where df/dt = 0: t0 + tr ln(tf/tr - 1) (eq. 1 differentiated
     * by hand), here 2 + 3 ln(20/3 - 1). */
    double tp = sim_bazin_t_peak(2.0, 3.0, 20.0);
    assert_close(tp, 7.203803166164319, 1e-12, "bazin t_peak");
    double fp = sim_bazin_flux(tp, 1.0, 0.0, 2.0, 3.0, 20.0);
    assert_true(fp > sim_bazin_flux(tp - 0.05, 1.0, 0.0, 2.0, 3.0, 20.0));
    assert_true(fp > sim_bazin_flux(tp + 0.05, 1.0, 0.0, 2.0, 3.0, 20.0));
}

static void test_drw_step(void **state)
{
    (void)state;
    /* source: Kelly, Bechtold & Siemiginowska 2009, ApJ 698, 895: given
     * x(t), x(t+dt) is normal with mean mu + (x-mu) e^{-dt/tau} and variance
     * s^2 (1 - e^{-2dt/tau}) (s^2 the stationary variance); Python math on
     * x=.3 mu=.1 tau=100 s=.2 dt=10 z=.7. */
    assert_close(sim_drw_step(0.3, 0.1, 100.0, 0.2, 10.0, 0.7),
                 0.34057350041482265, 1e-14, "drw step");
    assert_close(sim_drw_step(0.3, 0.1, 100.0, 0.2, 0.0, 0.7), 0.3, 1e-15, "dt=0");

    /* Statistical properties of the same process: stationary variance s^2
     * and lag-1 autocorrelation e^{-dt/tau} (same source). */
    rng r;
    rng_seed(&r, 99);
    const int n = 400000;
    double tau = 50.0, s = 0.25, dt = 5.0, x = 0.0;
    double sum = 0, sum2 = 0, lag = 0, prev = 0;
    for (int i = 0; i < n; i++) {
        x = sim_drw_step(x, 0.0, tau, s, dt, rng_normal(&r));
        sum += x;
        sum2 += x * x;
        if (i)
            lag += x * prev;
        prev = x;
    }
    double mean = sum / n, var = sum2 / n - mean * mean;
    double rho = (lag / (n - 1) - mean * mean) / var;
    assert_close(var, s * s, 0.05 * s * s, "drw stationary variance");
    assert_close(rho, exp(-dt / tau), 0.01, "drw lag-1 autocorrelation");
}

static void test_flare_template(void **state)
{
    (void)state;
    /* source: Davenport et al. 2014, ApJ 797, 122, eq. 1 (rise polynomial)
     * and eq. 4 (double exponential decay), coefficients from memory;
     * values by hand with Python math. */
    assert_close(sim_flare_template(0.0), 1.0, 1e-15, "peak");
    assert_close(sim_flare_template(-0.5), 0.19618749999999996, 1e-14, "rise -0.5");
    assert_close(sim_flare_template(-1.0), 1 - 1.941 - 0.175 + 2.246 - 1.125, 1e-14, "rise -1");
    assert_close(sim_flare_template(1.0), 0.3684988098607952, 1e-14, "decay 1");
    assert_close(sim_flare_template(-3.0), 0.0, 0.0, "before the flare");
    assert_true(sim_flare_template(5.0) < sim_flare_template(2.0));
}

static void test_mag_err(void **state)
{
    (void)state;
    /* source: sky-limited noise (common practice): sigma_m = 2.5/ln10 / SNR,
     * SNR = 5 at the 5-sigma limit and x10 per 2.5 mag brighter. */
    assert_close(sim_mag_err(23.0, 23.0), 0.21714724095162588, 1e-15, "at m5");
    assert_close(sim_mag_err(20.5, 23.0), 0.021714724095162587, 1e-15, "2.5 mag brighter");
    assert_true(sim_mag_err(22.0, 23.0) < sim_mag_err(22.5, 23.0));
}

/* ---- stream properties ------------------------------------------------- */

static sim *make_sim(uint64_t seed, double rare, unsigned hmax)
{
    sim_params p;
    sim_params_default(&p);
    p.seed = seed;
    for (unsigned i = 0; i < SIM_N_RARE; i++)
        p.rare_rate[i] = rare;
    if (hmax)
        p.history_max = hmax;
    /* These tests follow the survey from its first visit (every source
     * and link is seen); test_burn_in covers the default start. */
    p.burn_in_nights = 0;
    char err[128] = "";
    sim *s = sim_new(&p, err, sizeof err);
    if (!s)
        print_error("sim_new: %s\n", err);
    assert_non_null(s);
    return s;
}

static void test_params_check(void **state)
{
    (void)state;
    sim_params p;
    char err[128];
    sim_params_default(&p);
    assert_int_equal(sim_params_check(&p, err, sizeof err), 0);
    p.history_max = SIM_HISTORY_CAP + 1;
    assert_int_equal(sim_params_check(&p, err, sizeof err), -1);
    assert_non_null(strstr(err, "history_max"));
    assert_null(sim_new(&p, err, sizeof err));
    sim_params_default(&p);
    p.rare_rate[0] = 1.5;
    assert_int_equal(sim_params_check(&p, err, sizeof err), -1);
    sim_params_default(&p);
    p.burst = 0;
    assert_int_equal(sim_params_check(&p, err, sizeof err), -1);
}

static void test_determinism(void **state)
{
    (void)state;
    sim *a = make_sim(42, 0.001, 0), *b = make_sim(42, 0.001, 0), *c = make_sim(43, 0.001, 0);
    static sim_packet pa, pb, pc;
    static char ja[SIM_JSON_MAX], jb[SIM_JSON_MAX], jc[SIM_JSON_MAX];
    static uint8_t aa[SIM_AVRO_MAX], ab[SIM_AVRO_MAX];
    int differ = 0;
    for (int i = 0; i < 30000; i++) {
        sim_next(a, &pa);
        sim_next(b, &pb);
        sim_next(c, &pc);
        int na = sim_encode_json(&pa, ja, sizeof ja), nb = sim_encode_json(&pb, jb, sizeof jb);
        int nc = sim_encode_json(&pc, jc, sizeof jc);
        assert_true(na > 0 && nb > 0 && nc > 0);
        assert_int_equal(na, nb);
        assert_memory_equal(ja, jb, (size_t)na);
        if (na != nc || memcmp(ja, jc, (size_t)na) != 0)
            differ++;
        na = sim_encode_avro(&pa, aa, sizeof aa);
        nb = sim_encode_avro(&pb, ab, sizeof ab);
        assert_true(na > 0);
        assert_int_equal(na, nb);
        assert_memory_equal(aa, ab, (size_t)na);
    }
    assert_true(differ > 29000);  /* another seed, another stream */
    sim_free(a);
    sim_free(b);
    sim_free(c);
}

typedef struct last_seen {
    double mjd, mag, err;
    int band;
    int has_host;
    double host_sep, host_mu;
} last_seen;

static void check_order_and_history(unsigned hmax)
{
    sim *s = make_sim(7, 0.002, hmax);
    static sim_packet p;
    const int64_t id_cap = 8000000;
    last_seen *seen = calloc((size_t)id_cap, sizeof *seen);
    assert_non_null(seen);
    double prev_mjd = -1;
    int64_t prev_id = 0;
    long linked = 0, with_hist = 0, with_limit = 0, with_host = 0, n = 0;
    long nuclear = 0, host_kept = 0;
    unsigned max_hist = 0;
    for (int i = 0; i < 200000; i++) {
        sim_next(s, &p);
        assert_int_equal(p.packet_id, prev_id + 1);
        prev_id = p.packet_id;
        if (p.mjd < prev_mjd) {
            print_error("packet %ld: mjd %.6f after %.6f\n", (long)p.packet_id, p.mjd, prev_mjd);
            fail();
        }
        prev_mjd = p.mjd;
        assert_true(p.band < SIM_NBANDS);
        assert_true(p.n_hist <= hmax);
        assert_true(p.mag_err > 0 && p.quality >= 0 && p.quality <= 1);
        if (p.n_hist > max_hist)
            max_hist = p.n_hist;
        if (p.truth == SIM_POP_MOVING || p.truth == SIM_POP_ARTEFACT)
            assert_int_equal(p.n_hist, 0);
        for (unsigned k = 0; k < p.n_hist; k++) {
            assert_true(p.hist[k].mjd < p.mjd);
            assert_true(p.hist[k].mjd >= p.mjd - 30.0 - 1e-9);
            assert_true(p.hist[k].band < SIM_NBANDS);
            if (k)
                assert_true(p.hist[k].mjd > p.hist[k - 1].mjd);
        }
        /* The prior limit is an earlier visit within the horizon that did
         * not detect the source, so no history point shares its time; its
         * depth is a visit limit (band limits 21.2..23.2, +-0.6 seeing). */
        if (p.has_limit) {
            assert_true(p.limit_mjd < p.mjd && p.limit_mjd >= p.mjd - 30.0 - 1e-9);
            assert_true(p.limit_band < SIM_NBANDS);
            assert_true(p.limit_mag >= 20.6 - 1e-9 && p.limit_mag <= 23.8 + 1e-9);
            for (unsigned k = 0; k < p.n_hist; k++)
                assert_true(p.hist[k].mjd != p.limit_mjd);
            with_limit++;
        }
        assert_true(p.mover_sep_arcsec >= 0.0 && p.mover_sep_arcsec <= SIM_MOVER_RADIUS);
        /* The host: within the search radius (0.01 arcsec astrometric
         * floor), a distance modulus of a galaxy (30..50 covers z 0.002
         * to 4); nuclear variables sit at their galaxy's centre. */
        n++;
        if (p.has_host) {
            with_host++;
            assert_true(p.host_sep_arcsec >= 0.01 - 1e-9 &&
                        p.host_sep_arcsec <= SIM_HOST_RADIUS);
            assert_true(p.host_dist_mod > 30.0 && p.host_dist_mod < 50.0);
        }
        if (p.truth == SIM_POP_NUCLEAR) {
            nuclear++;
            assert_true(p.has_host);
            assert_true(p.host_sep_arcsec < 1.0);
        }
        /* The first detection is this one or earlier than all history. */
        assert_true(p.first_mjd <= p.mjd);
        if (p.n_hist)
            assert_true(p.first_mjd <= p.hist[0].mjd);
        else if (p.truth != SIM_POP_PERIODIC && p.truth != SIM_POP_NUCLEAR &&
                 p.truth != SIM_POP_FLARE && seen[p.source_id].mjd == 0)
            assert_true(p.first_mjd == p.mjd);  /* a new transient, mover or artefact */
        /* The newest history point is this source's previous packet. */
        assert_true(p.source_id > 0 && p.source_id < id_cap);
        last_seen *ls = &seen[p.source_id];
        /* A source keeps its host (moving bodies and artefacts are new
         * sources at every visit). */
        if (ls->mjd > 0) {
            assert_true(p.has_host == ls->has_host &&
                        p.host_sep_arcsec == ls->host_sep &&
                        p.host_dist_mod == ls->host_mu);
            host_kept += p.has_host;
        }
        if (p.n_hist) {
            with_hist++;
            const sim_point *h = &p.hist[p.n_hist - 1];
            assert_true(ls->mjd > 0);
            assert_true(h->mjd == ls->mjd && h->mag == ls->mag &&
                        h->mag_err == ls->err && h->band == ls->band);
            linked++;
        } else if (ls->mjd > 0) {
            /* No history although seen before: only past the horizon. */
            assert_true(ls->mjd < p.mjd - 30.0);
        }
        ls->mjd = p.mjd;
        ls->mag = p.mag;
        ls->err = p.mag_err;
        ls->band = p.band;
        ls->has_host = p.has_host;
        ls->host_sep = p.host_sep_arcsec;
        ls->host_mu = p.host_dist_mod;
    }
    assert_true(with_hist > 100000);
    /* Some packets have a host and some do not (about half of the stars,
     * movers and artefacts have a galaxy nearby by chance). */
    assert_true(with_host > n / 5 && with_host < n - n / 10);
    /* ... and the per-population checks above were not vacuous. */
    assert_true(nuclear > 1000);
    assert_true(host_kept > 10000);
    /* Moving objects and artefacts (23% of packets) are new at every
     * visit, so past the first visits of their field they all have a
     * prior limit; so do transients that were below the limit on an
     * earlier visit (measured about 36% of all packets here). */
    assert_true(with_limit > 46000);
    /* A 30-day horizon holds about 15 visits of a field: a small bound is
     * reached, a large one is not. */
    if (hmax <= 10)
        assert_int_equal(max_hist, hmax);
    else
        assert_true(max_hist >= 10);
    (void)linked;
    free(seen);
    sim_free(s);
}

static void test_order_and_history(void **state)
{
    (void)state;
    check_order_and_history(30);
}

static void test_history_bound_small(void **state)
{
    (void)state;
    check_order_and_history(5);
}

static void test_full_history_encodes(void **state)
{
    (void)state;
    /* The largest history (64 points, a 200-day horizon) fits the
     * documented buffer sizes of every encoder. */
    sim_params p;
    sim_params_default(&p);
    p.history_max = SIM_HISTORY_CAP;
    p.history_days = 200.0;
    p.n_fields = 50;
    sim *s = sim_new(&p, NULL, 0);
    assert_non_null(s);
    static sim_packet pk;
    static char js[SIM_JSON_MAX];
    static uint8_t av[SIM_AVRO_MAX + 5], cont[SIM_CONTAINER_MAX];
    uint8_t sync[16] = {0};
    unsigned max_hist = 0;
    for (int i = 0; i < 150000; i++) {
        sim_next(s, &pk);
        if (pk.n_hist < max_hist)
            continue;
        max_hist = pk.n_hist;
        assert_true(sim_encode_json(&pk, js, sizeof js) > 0);
        assert_true(sim_encode_schema_id(&pk, 1, av, sizeof av) > 0);
        assert_true(sim_encode_container(&pk, sync, cont, sizeof cont) > 0);
    }
    assert_int_equal(max_hist, SIM_HISTORY_CAP);
    sim_free(s);
}

static void test_population_rates(void **state)
{
    (void)state;
    /* Expected: the requested packet fractions (sim_params_default's mix,
     * normalised, sharing 1 - 3 * rare with each rare at `rare`). */
    const double rare = 0.003;
    sim *s = make_sim(11, rare, 0);
    sim_params d;
    sim_params_default(&d);
    double msum = 0;
    for (unsigned i = 0; i < SIM_N_COMMON; i++)
        msum += d.mix[i];
    static sim_packet p;
    long cnt[SIM_POP_COUNT_] = {0};
    const long n = 400000;
    for (long i = 0; i < n; i++) {
        sim_next(s, &p);
        assert_true((int)p.truth >= 0 && p.truth < SIM_POP_COUNT_);
        cnt[p.truth]++;
    }
    for (unsigned i = 0; i < SIM_POP_COUNT_; i++) {
        double want = i < SIM_N_COMMON ? d.mix[i] / msum * (1.0 - SIM_N_RARE * rare) : rare;
        double got = (double)cnt[i] / n;
        double tol = i < SIM_N_COMMON ? 0.08 * want : 0.30 * want;
        if (fabs(got - want) > tol) {
            print_error("%s: fraction %.5f, requested %.5f (tol %.5f)\n",
                        sim_pop_name((int)i), got, want, tol);
            fail();
        }
    }
    sim_free(s);

    /* Rare rate zero: none at all. */
    s = make_sim(12, 0.0, 0);
    for (long i = 0; i < 100000; i++) {
        sim_next(s, &p);
        assert_true(p.truth < SIM_POP_FIRST_RARE);
    }
    sim_free(s);
}

static void test_bazin_populations_brighten_then_fade(void **state)
{
    (void)state;
    /* A supernova-like source first brightens then fades: across its
     * r-band points the brightest one is neither always the first nor
     * always the last.  Collected over many sources. */
    sim *s = make_sim(5, 0.0, 64);
    static sim_packet p;
    long peak_inside = 0, sources = 0;
    for (int i = 0; i < 300000; i++) {
        sim_next(s, &p);
        if (p.truth != SIM_POP_SN_THERMO || p.n_hist < 12)
            continue;
        double best = 99;
        unsigned at = 0, nr = 0;
        for (unsigned k = 0; k < p.n_hist; k++) {
            if (p.hist[k].band != 2)
                continue;
            if (p.hist[k].mag < best) {
                best = p.hist[k].mag;
                at = nr;
            }
            nr++;
        }
        if (nr < 4)
            continue;
        sources++;
        if (at > 0 && at < nr - 1)
            peak_inside++;
    }
    assert_true(sources > 100);
    assert_true(peak_inside > sources / 5);
    sim_free(s);
}

/* ---- encodings decode back ------------------------------------------ */

static void check_json(const sim_packet *p, const char *txt, int n)
{
    json_error_t e;
    json_t *o = json_loadb(txt, (size_t)n, 0, &e);
    if (!o) {
        print_error("json: %s in %.*s\n", e.text, n, txt);
        fail();
    }
    assert_int_equal(json_integer_value(json_object_get(o, "packet_id")), p->packet_id);
    json_t *src = json_object_get(o, "source"), *obs = json_object_get(o, "obs");
    assert_int_equal(json_integer_value(json_object_get(src, "id")), p->source_id);
    assert_true(json_real_value(json_object_get(src, "ra_deg")) == p->ra_deg);
    assert_true(json_real_value(json_object_get(src, "dec_deg")) == p->dec_deg);
    assert_true(json_real_value(json_object_get(src, "first_mjd")) == p->first_mjd);
    assert_true(json_real_value(json_object_get(obs, "mjd")) == p->mjd);
    assert_true(json_real_value(json_object_get(obs, "mag")) == p->mag);
    assert_true(json_real_value(json_object_get(obs, "mag_err")) == p->mag_err);
    assert_true(json_real_value(json_object_get(obs, "quality")) == p->quality);
    assert_string_equal(json_string_value(json_object_get(obs, "band")), sim_band_name(p->band));
    assert_int_equal(json_integer_value(json_object_get(obs, "field")), p->field);
    assert_true(json_real_value(json_object_get(obs, "mover_sep_arcsec")) == p->mover_sep_arcsec);
    json_t *lim = json_object_get(o, "prior_limit");
    assert_non_null(lim);  /* present, null when there is none */
    if (p->has_limit) {
        assert_true(json_real_value(json_object_get(lim, "mjd")) == p->limit_mjd);
        assert_true(json_real_value(json_object_get(lim, "mag")) == p->limit_mag);
        assert_string_equal(json_string_value(json_object_get(lim, "band")),
                            sim_band_name(p->limit_band));
    } else {
        assert_true(json_is_null(lim));
    }
    json_t *host = json_object_get(o, "host");
    assert_non_null(host);  /* present, null when there is none */
    if (p->has_host) {
        assert_true(json_real_value(json_object_get(host, "sep_arcsec")) == p->host_sep_arcsec);
        assert_true(json_real_value(json_object_get(host, "dist_mod")) == p->host_dist_mod);
    } else {
        assert_true(json_is_null(host));
    }
    assert_string_equal(json_string_value(json_object_get(o, "truth")), sim_pop_name(p->truth));
    json_t *h = json_object_get(o, "history");
    assert_true(json_is_array(h));
    assert_int_equal(json_array_size(h), p->n_hist);
    for (unsigned k = 0; k < p->n_hist; k++) {
        json_t *pt = json_array_get(h, k);
        assert_true(json_real_value(json_object_get(pt, "mjd")) == p->hist[k].mjd);
        assert_true(json_real_value(json_object_get(pt, "mag")) == p->hist[k].mag);
        assert_true(json_real_value(json_object_get(pt, "mag_err")) == p->hist[k].mag_err);
        assert_string_equal(json_string_value(json_object_get(pt, "band")),
                            sim_band_name(p->hist[k].band));
    }
    json_decref(o);
}

static double rec_double(avro_value_t *rec, const char *name)
{
    avro_value_t f;
    double d = NAN;
    assert_int_equal(avro_value_get_by_name(rec, name, &f, NULL), 0);
    assert_int_equal(avro_value_get_double(&f, &d), 0);
    return d;
}

static int64_t rec_long(avro_value_t *rec, const char *name)
{
    avro_value_t f;
    int64_t v = 0;
    assert_int_equal(avro_value_get_by_name(rec, name, &f, NULL), 0);
    assert_int_equal(avro_value_get_long(&f, &v), 0);
    return v;
}

static void rec_band(avro_value_t *rec, unsigned want)
{
    avro_value_t f;
    const char *str = NULL;
    size_t sz = 0;
    assert_int_equal(avro_value_get_by_name(rec, "band", &f, NULL), 0);
    assert_int_equal(avro_value_get_string(&f, &str, &sz), 0);
    assert_string_equal(str, sim_band_name((int)want));
}

static void check_avro_value(const sim_packet *p, avro_value_t *v)
{
    assert_int_equal(rec_long(v, "packet_id"), p->packet_id);
    avro_value_t src, obs, hist, truth;
    assert_int_equal(avro_value_get_by_name(v, "source", &src, NULL), 0);
    assert_int_equal(rec_long(&src, "id"), p->source_id);
    assert_true(rec_double(&src, "ra_deg") == p->ra_deg);
    assert_true(rec_double(&src, "dec_deg") == p->dec_deg);
    assert_true(rec_double(&src, "first_mjd") == p->first_mjd);
    assert_int_equal(avro_value_get_by_name(v, "obs", &obs, NULL), 0);
    assert_true(rec_double(&obs, "mjd") == p->mjd);
    assert_true(rec_double(&obs, "mag") == p->mag);
    assert_true(rec_double(&obs, "mag_err") == p->mag_err);
    assert_true(rec_double(&obs, "quality") == p->quality);
    rec_band(&obs, p->band);
    avro_value_t fld;
    int32_t fi = -1;
    assert_int_equal(avro_value_get_by_name(&obs, "field", &fld, NULL), 0);
    assert_int_equal(avro_value_get_int(&fld, &fi), 0);
    assert_int_equal(fi, p->field);
    assert_true(rec_double(&obs, "mover_sep_arcsec") == p->mover_sep_arcsec);
    avro_value_t lim, branch;
    int disc = -1;
    assert_int_equal(avro_value_get_by_name(v, "prior_limit", &lim, NULL), 0);
    assert_int_equal(avro_value_get_discriminant(&lim, &disc), 0);
    assert_int_equal(disc, p->has_limit ? 1 : 0);
    if (p->has_limit) {
        assert_int_equal(avro_value_get_current_branch(&lim, &branch), 0);
        assert_true(rec_double(&branch, "mjd") == p->limit_mjd);
        assert_true(rec_double(&branch, "mag") == p->limit_mag);
        rec_band(&branch, p->limit_band);
    }
    avro_value_t host;
    assert_int_equal(avro_value_get_by_name(v, "host", &host, NULL), 0);
    assert_int_equal(avro_value_get_discriminant(&host, &disc), 0);
    assert_int_equal(disc, p->has_host ? 1 : 0);
    if (p->has_host) {
        assert_int_equal(avro_value_get_current_branch(&host, &branch), 0);
        assert_true(rec_double(&branch, "sep_arcsec") == p->host_sep_arcsec);
        assert_true(rec_double(&branch, "dist_mod") == p->host_dist_mod);
    }
    assert_int_equal(avro_value_get_by_name(v, "history", &hist, NULL), 0);
    size_t n = 0;
    assert_int_equal(avro_value_get_size(&hist, &n), 0);
    assert_int_equal(n, p->n_hist);
    for (unsigned k = 0; k < p->n_hist; k++) {
        avro_value_t pt;
        assert_int_equal(avro_value_get_by_index(&hist, k, &pt, NULL), 0);
        assert_true(rec_double(&pt, "mjd") == p->hist[k].mjd);
        assert_true(rec_double(&pt, "mag") == p->hist[k].mag);
        assert_true(rec_double(&pt, "mag_err") == p->hist[k].mag_err);
        rec_band(&pt, p->hist[k].band);
    }
    assert_int_equal(avro_value_get_by_name(v, "truth", &truth, NULL), 0);
    int e = -1;
    assert_int_equal(avro_value_get_enum(&truth, &e), 0);
    assert_int_equal(e, (int)p->truth);
}

static void test_burn_in(void **state)
{
    (void)state;
    /* Default params: the survey has run burn_in_nights (30) before the
     * first packet, which is packet 1 on night 0 at or after start_mjd,
     * and already carries history (some of it before start_mjd) and prior
     * limits; without burn-in the first packets have neither. */
    sim_params p;
    sim_params_default(&p);
    assert_int_equal(p.burn_in_nights, 30);
    sim *s = sim_new(&p, NULL, 0);
    assert_non_null(s);
    static sim_packet pk;
    long with_hist = 0, with_limit = 0, hist_before_start = 0;
    for (int i = 0; i < 2000; i++) {
        sim_next(s, &pk);
        assert_int_equal(pk.packet_id, i + 1);
        assert_true(pk.mjd >= p.start_mjd && pk.mjd < p.start_mjd + 1.0);
        with_hist += pk.n_hist > 0;
        with_limit += pk.has_limit;
        for (unsigned k = 0; k < pk.n_hist; k++)
            hist_before_start += pk.hist[k].mjd < p.start_mjd;
    }
    assert_int_equal(sim_night(s), 0);
    assert_true(with_hist > 1000);
    assert_true(hist_before_start > 1000);
    assert_true(with_limit > 300);
    sim_free(s);

    p.burn_in_nights = 0;
    s = sim_new(&p, NULL, 0);
    assert_non_null(s);
    for (int i = 0; i < 200; i++) {
        sim_next(s, &pk);
        assert_int_equal(pk.n_hist, 0);
        assert_false(pk.has_limit);
    }
    sim_free(s);

    p.burn_in_nights = 1001;
    char err[128] = "";
    assert_null(sim_new(&p, err, sizeof err));
    assert_non_null(strstr(err, "burn_in_nights"));
}

static void test_schema_file_matches(void **state)
{
    (void)state;
    avro_schema_t file = load_schema();
    avro_schema_t emb = NULL;
    avro_schema_error_t e;
    const char *txt = sim_schema_json();
    assert_int_equal(avro_schema_from_json(txt, (int32_t)strlen(txt), &emb, &e), 0);
    assert_true(avro_schema_equal(file, emb));
    /* The Population symbols are the population names, in enum order. */
    avro_schema_t truth = avro_schema_record_field_get(file, "truth");
    assert_non_null(truth);
    assert_int_equal(avro_schema_enum_number_of_symbols(truth), SIM_POP_COUNT_);
    for (int i = 0; i < (int)SIM_POP_COUNT_; i++)
        assert_string_equal(avro_schema_enum_get(truth, i), sim_pop_name(i));
    avro_schema_decref(emb);
    avro_schema_decref(file);
}

static void test_encodings_decode(void **state)
{
    (void)state;
    avro_schema_t sc = load_schema();
    avro_value_iface_t *iface = avro_generic_class_from_schema(sc);
    avro_value_t v;
    assert_int_equal(avro_generic_value_new(iface, &v), 0);
    avro_reader_t rd = avro_reader_memory(NULL, 0);
    sim *s = make_sim(3, 0.01, 0);
    static sim_packet p;
    static char js[SIM_JSON_MAX];
    static uint8_t av[SIM_AVRO_MAX + 8], cont[SIM_CONTAINER_MAX];
    uint8_t sync[16];
    sim_sync_marker(3, sync);
    unsigned seen_pop = 0;
    int seen_host[2] = {0, 0};  /* packets with host null, with a Host */
    for (int i = 0; i < 4000; i++) {
        sim_next(s, &p);
        seen_pop |= 1u << p.truth;
        seen_host[p.has_host ? 1 : 0]++;
        int n = sim_encode_json(&p, js, sizeof js);
        assert_true(n > 0);
        check_json(&p, js, n);

        n = sim_encode_avro(&p, av, SIM_AVRO_MAX);
        assert_true(n > 0);
        avro_reader_memory_set_source(rd, (const char *)av, n);
        avro_value_reset(&v);
        assert_int_equal(avro_value_read(rd, &v), 0);
        check_avro_value(&p, &v);

        n = sim_encode_schema_id(&p, 0x01020304u, av, sizeof av);
        assert_true(n > 5);
        assert_int_equal(av[0], 0);
        assert_int_equal(av[1], 1);
        assert_int_equal(av[2], 2);
        assert_int_equal(av[3], 3);
        assert_int_equal(av[4], 4);
        avro_reader_memory_set_source(rd, (const char *)av + 5, n - 5);
        avro_value_reset(&v);
        assert_int_equal(avro_value_read(rd, &v), 0);
        check_avro_value(&p, &v);

        if (i % 50 == 0) {
            /* source: avro-c's own container reader over fmemopen (NOTES.md). */
            n = sim_encode_container(&p, sync, cont, sizeof cont);
            assert_true(n > 0);
            FILE *f = fmemopen(cont, (size_t)n, "rb");
            assert_non_null(f);
            avro_file_reader_t fr;
            assert_int_equal(avro_file_reader_fp(f, "mem", 1, &fr), 0);
            avro_schema_t ws = avro_file_reader_get_writer_schema(fr);
            assert_true(avro_schema_equal(ws, sc));
            avro_schema_decref(ws);
            avro_value_t cv;
            assert_int_equal(avro_generic_value_new(iface, &cv), 0);
            assert_int_equal(avro_file_reader_read_value(fr, &cv), 0);
            check_avro_value(&p, &cv);
            assert_int_not_equal(avro_file_reader_read_value(fr, &cv), 0);  /* just one */
            avro_value_decref(&cv);
            avro_file_reader_close(fr);
        }
    }
    assert_int_equal(seen_pop, (1u << SIM_POP_COUNT_) - 1);  /* all populations exercised */
    /* both branches of the host union went through every encoding */
    assert_true(seen_host[0] > 100 && seen_host[1] > 100);
    /* Too small a buffer is refused, not overrun. */
    assert_int_equal(sim_encode_json(&p, js, 10), -1);
    assert_int_equal(sim_encode_avro(&p, av, 10), -1);
    assert_int_equal(sim_encode_container(&p, sync, cont, 100), -1);
    sim_free(s);
    avro_reader_free(rd);
    avro_value_decref(&v);
    avro_value_iface_decref(iface);
    avro_schema_decref(sc);
}

static void test_container_many_blocks(void **state)
{
    (void)state;
    /* Header + three blocks, as `oddsky simulate --format avro-container`
     * writes a file; read back with avro-c's container reader. */
    avro_schema_t sc = load_schema();
    avro_value_iface_t *iface = avro_generic_class_from_schema(sc);
    size_t cap = 1u << 20;
    uint8_t *file = malloc(cap), *blk = malloc(cap / 2);
    assert_non_null(file);
    assert_non_null(blk);
    uint8_t sync[16];
    sim_sync_marker(9, sync);
    int at = sim_container_header(sync, file, cap);
    assert_true(at > 0);
    sim *s = make_sim(9, 0.001, 0);
    static sim_packet pk[300];
    for (int b = 0; b < 3; b++) {
        size_t len = 0;
        for (int i = 0; i < 100; i++) {
            sim_next(s, &pk[b * 100 + i]);
            int n = sim_encode_avro(&pk[b * 100 + i], blk + len, SIM_AVRO_MAX);
            assert_true(n > 0);
            len += (size_t)n;
        }
        int n = sim_container_block(100, blk, len, sync, file + at, cap - (size_t)at);
        assert_true(n > 0);
        at += n;
    }
    FILE *f = fmemopen(file, (size_t)at, "rb");
    avro_file_reader_t fr;
    assert_int_equal(avro_file_reader_fp(f, "mem", 1, &fr), 0);
    avro_value_t v;
    assert_int_equal(avro_generic_value_new(iface, &v), 0);
    int got = 0;
    while (avro_file_reader_read_value(fr, &v) == 0) {
        assert_true(got < 300);
        check_avro_value(&pk[got], &v);
        got++;
        avro_value_reset(&v);
    }
    assert_int_equal(got, 300);
    avro_value_decref(&v);
    avro_file_reader_close(fr);
    sim_free(s);
    free(file);
    free(blk);
    avro_value_iface_decref(iface);
    avro_schema_decref(sc);
}

/* ---- the demo feature map ---------------------------------------------- */

static void test_demo_featmap(void **state)
{
    (void)state;
    char *txt = slurp(FEATMAP_PATH, NULL);
    assert_non_null(txt);
    /* The models never read the evaluation label. */
    assert_null(strstr(txt, "truth"));
    json_error_t je;
    json_t *spec = json_loads(txt, 0, &je);
    free(txt);
    assert_non_null(spec);
    char err[256] = "";
    featmap *fm = featmap_new(spec, err, sizeof err);
    if (!fm)
        print_error("featmap: %s\n", err);
    assert_non_null(fm);
    uint32_t dim = featmap_dim(fm);
    assert_true(dim >= 10 && dim <= 20);

    avro_schema_t sc = load_schema();
    featmap_plan *plan = featmap_plan_avro(fm, sc, err, sizeof err);
    assert_non_null(plan);
    assert_true(featmap_plan_resolved(plan) > 0);
    featmap_scratch *scr = featmap_scratch_new(fm);
    assert_non_null(scr);
    avro_value_iface_t *iface = avro_generic_class_from_schema(sc);
    avro_value_t v;
    assert_int_equal(avro_generic_value_new(iface, &v), 0);
    avro_reader_t rd = avro_reader_memory(NULL, 0);
    static packet_features out;
    static sim_packet p;
    static uint8_t av[SIM_AVRO_MAX];
    long present[MODEL_MAX_DIM] = {0};
    sim *s = make_sim(21, 0.001, 0);
    /* Skip the first nights, whose histories are still short. */
    for (int i = 0; i < 150000; i++)
        sim_next(s, &p);
    for (int i = 0; i < 20000; i++) {
        sim_next(s, &p);
        int n = sim_encode_avro(&p, av, sizeof av);
        avro_reader_memory_set_source(rd, (const char *)av, n);
        avro_value_reset(&v);
        assert_int_equal(avro_value_read(rd, &v), 0);
        assert_int_equal(featmap_extract_avro(fm, plan, &v, scr, &out), 0);
        assert_int_equal(out.type_errors, 0);
        for (uint32_t j = 0; j < dim; j++)
            present[j] += !out.missing[j];
    }
    /* Every feature is computable on a good share of the stream. */
    for (uint32_t j = 0; j < dim; j++) {
        if (present[j] < 1000) {
            print_error("feature %s present in only %ld of 20000 packets\n",
                        featmap_name(fm, j), present[j]);
            fail();
        }
    }
    sim_free(s);
    avro_reader_free(rd);
    avro_value_decref(&v);
    avro_value_iface_decref(iface);
    featmap_scratch_free(scr);
    featmap_plan_free(plan);
    avro_schema_decref(sc);
    featmap_free(fm);
    json_decref(spec);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_bazin_formula),
        cmocka_unit_test(test_drw_step),
        cmocka_unit_test(test_flare_template),
        cmocka_unit_test(test_mag_err),
        cmocka_unit_test(test_params_check),
        cmocka_unit_test(test_determinism),
        cmocka_unit_test(test_order_and_history),
        cmocka_unit_test(test_history_bound_small),
        cmocka_unit_test(test_full_history_encodes),
        cmocka_unit_test(test_population_rates),
        cmocka_unit_test(test_bazin_populations_brighten_then_fade),
        cmocka_unit_test(test_burn_in),
        cmocka_unit_test(test_schema_file_matches),
        cmocka_unit_test(test_encodings_decode),
        cmocka_unit_test(test_container_many_blocks),
        cmocka_unit_test(test_demo_featmap),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
