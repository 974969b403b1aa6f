/* test_tlink.c - host tests of the tlink codec: shared vectors, CRC, limits, fuzz; and a benchmark.
 *
 * usage: test_tlink VECTOR_DIR            run all tests (exit status 0 = all passed)
 *        test_tlink --bench SECONDS       decoder throughput in bytes/s (one line of JSON)
 *        test_tlink --decode < STREAM     decode stdin; one line per accepted frame, then the counters
 *                                         (for differential tests against the Python decoder)
 */
#define _POSIX_C_SOURCE 199309L
#include "tlink.h"

#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

static int failures = 0;
static int checks = 0;
#define CHECK(cond, ...)                                                                          \
    do {                                                                                          \
        checks++;                                                                                 \
        if (!(cond)) {                                                                            \
            failures++;                                                                           \
            fprintf(stderr, "FAIL %s:%d: ", __FILE__, __LINE__);                                  \
            fprintf(stderr, __VA_ARGS__);                                                         \
            fputc('\n', stderr);                                                                  \
        }                                                                                         \
    } while (0)

/* ------------------------------------------------------------------ deterministic generator */
static uint32_t rng_state = 12345u;
static uint32_t rnd(void)
{
    /* xorshift32 (Marsaglia 2003): deterministic, seeded */
    rng_state ^= rng_state << 13;
    rng_state ^= rng_state >> 17;
    rng_state ^= rng_state << 5;
    return rng_state;
}

static size_t read_file(const char *path, uint8_t *buf, size_t cap)
{
    FILE *f = fopen(path, "rb");
    size_t n;
    if (f == NULL) {
        return 0;
    }
    n = fread(buf, 1, cap, f);
    fclose(f);
    return n;
}

/* ------------------------------------------------------------------ manifest field tables */
enum kind { K_F32, K_I32, K_U32, K_U16, K_U8, K_I64, K_TEXT };
typedef struct {
    const char *name;
    enum kind kind;
    size_t offset;
} field_t;

#define FLD(T, m, k) {#m, k, offsetof(T, m)}
static const field_t pose_fields[] = {
    FLD(tlink_pose_t, x_m, K_F32), FLD(tlink_pose_t, y_m, K_F32), FLD(tlink_pose_t, yaw_rad, K_F32),
    FLD(tlink_pose_t, lat_e7, K_I32), FLD(tlink_pose_t, lon_e7, K_I32),
    {"cov0", K_F32, offsetof(tlink_pose_t, cov) + 0 * sizeof(float)},
    {"cov1", K_F32, offsetof(tlink_pose_t, cov) + 1 * sizeof(float)},
    {"cov2", K_F32, offsetof(tlink_pose_t, cov) + 2 * sizeof(float)},
    {"cov3", K_F32, offsetof(tlink_pose_t, cov) + 3 * sizeof(float)},
    {"cov4", K_F32, offsetof(tlink_pose_t, cov) + 4 * sizeof(float)},
    {"cov5", K_F32, offsetof(tlink_pose_t, cov) + 5 * sizeof(float)},
    FLD(tlink_pose_t, frame_ms, K_F32), FLD(tlink_pose_t, quality, K_U8), FLD(tlink_pose_t, status, K_TEXT),
    {NULL, K_U8, 0}};
static const field_t status_fields[] = {
    FLD(tlink_status_t, state, K_U8), FLD(tlink_status_t, quality, K_U8), FLD(tlink_status_t, flags, K_U16),
    FLD(tlink_status_t, frames_in, K_U32), FLD(tlink_status_t, frames_dropped, K_U32),
    FLD(tlink_status_t, link_errors, K_U32), FLD(tlink_status_t, text, K_TEXT), {NULL, K_U8, 0}};
static const field_t timesync_fields[] = {
    FLD(tlink_timesync_t, t_origin_us, K_I64), FLD(tlink_timesync_t, t_receive_us, K_I64),
    FLD(tlink_timesync_t, t_transmit_us, K_I64), FLD(tlink_timesync_t, phase, K_U8), {NULL, K_U8, 0}};
static const field_t odometry_fields[] = {
    FLD(tlink_odometry_t, x_m, K_F32), FLD(tlink_odometry_t, y_m, K_F32), FLD(tlink_odometry_t, yaw_rad, K_F32),
    FLD(tlink_odometry_t, speed_mps, K_F32), FLD(tlink_odometry_t, yaw_rate_radps, K_F32),
    FLD(tlink_odometry_t, left_ticks, K_I32), FLD(tlink_odometry_t, right_ticks, K_I32),
    FLD(tlink_odometry_t, flags, K_U8), {NULL, K_U8, 0}};
static const field_t imu_fields[] = {
    {"fx", K_F32, offsetof(tlink_imu_t, f) + 0 * sizeof(float)},
    {"fy", K_F32, offsetof(tlink_imu_t, f) + 1 * sizeof(float)},
    {"fz", K_F32, offsetof(tlink_imu_t, f) + 2 * sizeof(float)},
    {"gx", K_F32, offsetof(tlink_imu_t, gyro) + 0 * sizeof(float)},
    {"gy", K_F32, offsetof(tlink_imu_t, gyro) + 1 * sizeof(float)},
    {"gz", K_F32, offsetof(tlink_imu_t, gyro) + 2 * sizeof(float)},
    FLD(tlink_imu_t, flags, K_U8), {NULL, K_U8, 0}};
static const field_t heartbeat_fields[] = {
    FLD(tlink_heartbeat_t, uptime_ms, K_U32), FLD(tlink_heartbeat_t, rx_ok, K_U32),
    FLD(tlink_heartbeat_t, rx_bad_crc, K_U32), FLD(tlink_heartbeat_t, rx_resyncs, K_U32),
    FLD(tlink_heartbeat_t, state, K_U8), FLD(tlink_heartbeat_t, reset_cause, K_U8),
    FLD(tlink_heartbeat_t, flags, K_U16), {NULL, K_U8, 0}};

static int set_field(const field_t *tab, void *obj, const char *key, const char *val)
{
    uint8_t *base = (uint8_t *)obj;
    for (; tab->name != NULL; tab++) {
        if (strcmp(tab->name, key) != 0) {
            continue;
        }
        switch (tab->kind) {
        case K_F32: { float f = (float)strtod(val, NULL); memcpy(base + tab->offset, &f, sizeof f); break; }
        case K_I32: { int32_t v = (int32_t)strtol(val, NULL, 10); memcpy(base + tab->offset, &v, sizeof v); break; }
        case K_U32: { uint32_t v = (uint32_t)strtoul(val, NULL, 10); memcpy(base + tab->offset, &v, sizeof v); break; }
        case K_U16: { uint16_t v = (uint16_t)strtoul(val, NULL, 10); memcpy(base + tab->offset, &v, sizeof v); break; }
        case K_U8: { uint8_t v = (uint8_t)strtoul(val, NULL, 10); memcpy(base + tab->offset, &v, sizeof v); break; }
        case K_I64: { int64_t v = (int64_t)strtoll(val, NULL, 10); memcpy(base + tab->offset, &v, sizeof v); break; }
        case K_TEXT: {
            size_t n = strlen(val);
            if (n > TLINK_TEXT_LEN) {
                return 0;
            }
            memset(base + tab->offset, 0, TLINK_TEXT_LEN);
            memcpy(base + tab->offset, val, n);
            break;
        }
        }
        return 1;
    }
    return 0;
}

/* ------------------------------------------------------------------ vectors */
static void test_frame_vector(const char *dir, char *line)
{
    char path[512], *tok, *save = NULL;
    uint8_t file[512], enc[TLINK_MAX_WIRE];
    size_t n, i, m = 0;
    const char *fname, *tname;
    long seq = -1;
    long long t_us = 0;
    int got = 0;
    tlink_decoder_t d;
    tlink_frame_t fr;
    union {
        tlink_pose_t pose;
        tlink_status_t status;
        tlink_timesync_t ts;
        tlink_odometry_t odo;
        tlink_imu_t imu;
        tlink_heartbeat_t hb;
    } want, have;
    const field_t *tab = NULL;
    uint8_t type = 0;

    strtok_r(line, " \n", &save); /* "frame" */
    fname = strtok_r(NULL, " \n", &save);
    tname = strtok_r(NULL, " \n", &save);
    if (fname == NULL || tname == NULL) {
        CHECK(0, "malformed manifest line");
        return;
    }
    if (strcmp(tname, "pose") == 0) { tab = pose_fields; type = TLINK_TYPE_POSE; }
    else if (strcmp(tname, "status") == 0) { tab = status_fields; type = TLINK_TYPE_STATUS; }
    else if (strcmp(tname, "timesync") == 0) { tab = timesync_fields; type = TLINK_TYPE_TIMESYNC; }
    else if (strcmp(tname, "odometry") == 0) { tab = odometry_fields; type = TLINK_TYPE_ODOMETRY; }
    else if (strcmp(tname, "imu") == 0) { tab = imu_fields; type = TLINK_TYPE_IMU; }
    else if (strcmp(tname, "heartbeat") == 0) { tab = heartbeat_fields; type = TLINK_TYPE_HEARTBEAT; }
    CHECK(tab != NULL, "%s: unknown type %s", fname, tname);
    if (tab == NULL) {
        return;
    }
    memset(&want, 0, sizeof want);
    memset(&have, 0, sizeof have);
    while ((tok = strtok_r(NULL, " \n", &save)) != NULL) {
        char *eq = strchr(tok, '=');
        if (eq == NULL) {
            continue;
        }
        *eq = '\0';
        if (strcmp(tok, "seq") == 0) {
            seq = strtol(eq + 1, NULL, 10);
        } else if (strcmp(tok, "t_us") == 0) {
            t_us = strtoll(eq + 1, NULL, 10);
        } else {
            CHECK(set_field(tab, &want, tok, eq + 1), "%s: unknown field %s", fname, tok);
        }
    }
    snprintf(path, sizeof path, "%s/%s", dir, fname);
    n = read_file(path, file, sizeof file);
    CHECK(n > 0, "%s: cannot read", path);

    /* decode byte at a time */
    tlink_decoder_init(&d);
    for (i = 0; i < n; i++) {
        if (tlink_decoder_push(&d, file[i], &fr)) {
            got++;
            CHECK(fr.type == type, "%s: type %u", fname, fr.type);
            CHECK((long)fr.seq == seq, "%s: seq %u != %ld", fname, fr.seq, seq);
            CHECK(fr.t_us == (int64_t)t_us, "%s: t_us", fname);
            switch (type) {
            case TLINK_TYPE_POSE: CHECK(tlink_get_pose(&fr, &have.pose), "%s: get", fname); break;
            case TLINK_TYPE_STATUS: CHECK(tlink_get_status(&fr, &have.status), "%s: get", fname); break;
            case TLINK_TYPE_TIMESYNC: CHECK(tlink_get_timesync(&fr, &have.ts), "%s: get", fname); break;
            case TLINK_TYPE_ODOMETRY: CHECK(tlink_get_odometry(&fr, &have.odo), "%s: get", fname); break;
            case TLINK_TYPE_IMU: CHECK(tlink_get_imu(&fr, &have.imu), "%s: get", fname); break;
            default: CHECK(tlink_get_heartbeat(&fr, &have.hb), "%s: get", fname); break;
            }
            CHECK(memcmp(&want, &have, sizeof want) == 0, "%s: decoded fields differ from the manifest", fname);
        }
    }
    CHECK(got == 1, "%s: %d frames decoded", fname, got);

    /* encode the manifest's fields: byte-identical to the file */
    switch (type) {
    case TLINK_TYPE_POSE: m = tlink_put_pose(&want.pose, (uint16_t)seq, t_us, enc, sizeof enc); break;
    case TLINK_TYPE_STATUS: m = tlink_put_status(&want.status, (uint16_t)seq, t_us, enc, sizeof enc); break;
    case TLINK_TYPE_TIMESYNC: m = tlink_put_timesync(&want.ts, (uint16_t)seq, t_us, enc, sizeof enc); break;
    case TLINK_TYPE_ODOMETRY: m = tlink_put_odometry(&want.odo, (uint16_t)seq, t_us, enc, sizeof enc); break;
    case TLINK_TYPE_IMU: m = tlink_put_imu(&want.imu, (uint16_t)seq, t_us, enc, sizeof enc); break;
    default: m = tlink_put_heartbeat(&want.hb, (uint16_t)seq, t_us, enc, sizeof enc); break;
    }
    CHECK(m == n && memcmp(enc, file, n) == 0, "%s: encoding differs from the file (%zu vs %zu bytes)", fname, m, n);
    /* encoder limits: exactly enough room works, one byte less gives 0 (sticky fault) */
    switch (type) {
    case TLINK_TYPE_POSE:
        CHECK(tlink_put_pose(&want.pose, (uint16_t)seq, t_us, enc, n) == n, "%s: exact cap", fname);
        CHECK(tlink_put_pose(&want.pose, (uint16_t)seq, t_us, enc, n - 1) == 0, "%s: cap - 1", fname);
        break;
    default:
        break;
    }
}

static void test_stream_vector(const char *dir, char *line)
{
    char path[512], *tok, *save = NULL;
    static uint8_t file[65536];
    size_t n, i;
    const char *fname;
    tlink_decoder_t d;
    tlink_frame_t fr;
    strtok_r(line, " \n", &save);
    fname = strtok_r(NULL, " \n", &save);
    if (fname == NULL) {
        CHECK(0, "malformed stream line");
        return;
    }
    snprintf(path, sizeof path, "%s/%s", dir, fname);
    n = read_file(path, file, sizeof file);
    CHECK(n > 0, "%s: cannot read", path);
    tlink_decoder_init(&d);
    for (i = 0; i < n; i++) {
        (void)tlink_decoder_push(&d, file[i], &fr);
    }
    while ((tok = strtok_r(NULL, " \n", &save)) != NULL) {
        char *eq = strchr(tok, '=');
        unsigned long want, have = 0xFFFFFFFFul;
        if (eq == NULL) {
            continue;
        }
        *eq = '\0';
        want = strtoul(eq + 1, NULL, 10);
        if (strcmp(tok, "frames_ok") == 0) have = d.counters.frames_ok;
        else if (strcmp(tok, "bad_crc") == 0) have = d.counters.bad_crc;
        else if (strcmp(tok, "bad_cobs") == 0) have = d.counters.bad_cobs;
        else if (strcmp(tok, "bad_length") == 0) have = d.counters.bad_length;
        else if (strcmp(tok, "bad_version") == 0) have = d.counters.bad_version;
        else if (strcmp(tok, "too_long") == 0) have = d.counters.too_long;
        else if (strcmp(tok, "unknown_type") == 0) have = d.counters.unknown_type;
        else if (strcmp(tok, "resyncs") == 0) have = d.counters.resyncs;
        CHECK(have == want, "%s: counter %s = %lu, manifest says %lu", fname, tok, have, want);
    }
}

static void test_vectors(const char *dir)
{
    char path[512], line[2048];
    FILE *f;
    int frames = 0, streams = 0;
    snprintf(path, sizeof path, "%s/vectors.txt", dir);
    f = fopen(path, "r");
    CHECK(f != NULL, "cannot open %s", path);
    if (f == NULL) {
        return;
    }
    while (fgets(line, sizeof line, f) != NULL) {
        if (strncmp(line, "frame ", 6) == 0) {
            test_frame_vector(dir, line);
            frames++;
        } else if (strncmp(line, "stream ", 7) == 0) {
            test_stream_vector(dir, line);
            streams++;
        }
    }
    fclose(f);
    CHECK(frames >= 6 && streams >= 1, "manifest holds %d frames, %d streams", frames, streams);
    printf("vectors: %d frames, %d streams\n", frames, streams);
}

/* ------------------------------------------------------------------ CRC */
static uint32_t crc_bitwise(const uint8_t *p, size_t n)
{
    uint32_t reg = 0xFFFFFFFFu;
    size_t i;
    int k;
    for (i = 0; i < n; i++) {
        reg ^= p[i];
        for (k = 0; k < 8; k++) {
            reg = (reg & 1u) ? (reg >> 1) ^ 0xEDB88320u : reg >> 1;
        }
    }
    return reg ^ 0xFFFFFFFFu;
}

static void test_crc(void)
{
    uint8_t buf[300];
    size_t i, n;
    int t;
    /* Catalogue check value of CRC-32/ISO-HDLC (Greg Cook's catalogue): 0xCBF43926. */
    CHECK(tlink_crc32((const uint8_t *)"123456789", 9) == 0xCBF43926u, "check value %08lx",
          (unsigned long)tlink_crc32((const uint8_t *)"123456789", 9));
    for (i = 0; i < 256; i++) { /* single bytes touch every table entry */
        buf[0] = (uint8_t)i;
        CHECK(tlink_crc32(buf, 1) == crc_bitwise(buf, 1), "table entry for byte %zu", i);
    }
    for (t = 0; t < 500; t++) {
        n = rnd() % sizeof buf;
        for (i = 0; i < n; i++) {
            buf[i] = (uint8_t)rnd();
        }
        CHECK(tlink_crc32(buf, n) == crc_bitwise(buf, n), "random input of %zu bytes", n);
    }
}

/* ------------------------------------------------------------------ limits */
static void test_limits(void)
{
    uint8_t payload[TLINK_MAX_PAYLOAD + 1], enc[TLINK_MAX_WIRE + 8];
    size_t n, i;
    tlink_decoder_t d;
    tlink_frame_t fr;
    int got = 0;
    for (i = 0; i < sizeof payload; i++) {
        payload[i] = (uint8_t)(i * 7u); /* includes zeros */
    }
    n = tlink_encode(0x55, 1, 2, payload, TLINK_MAX_PAYLOAD, enc, sizeof enc);
    CHECK(n > 0 && n <= TLINK_MAX_WIRE, "max payload encodes (%zu bytes)", n);
    CHECK(tlink_encode(0x55, 1, 2, payload, TLINK_MAX_PAYLOAD + 1, enc, sizeof enc) == 0, "one past rejected");
    tlink_decoder_init(&d);
    for (i = 0; i < n; i++) {
        if (tlink_decoder_push(&d, enc[i], &fr)) {
            got++;
            CHECK(fr.len == TLINK_MAX_PAYLOAD && memcmp(fr.payload, payload, fr.len) == 0, "max payload content");
        }
    }
    CHECK(got == 1 && d.counters.unknown_type == 1, "max payload frame decoded (%d)", got);
    /* truncated: every prefix followed by a delimiter is rejected, never accepted */
    for (i = 2; i + 1 < n; i++) {
        size_t k;
        tlink_decoder_init(&d);
        for (k = 0; k < i; k++) {
            CHECK(!tlink_decoder_push(&d, enc[k], &fr), "prefix accepted early");
        }
        CHECK(!tlink_decoder_push(&d, 0x00, &fr), "truncated frame of %zu bytes accepted", i);
        CHECK(d.counters.resyncs == 1, "truncated frame counted");
    }
    /* one decoded byte past the limit: a run of TLINK_MAX_ENCODED + 1 non-zero bytes */
    tlink_decoder_init(&d);
    (void)tlink_decoder_push(&d, 0x00, &fr);
    for (i = 0; i < TLINK_MAX_ENCODED + 1; i++) {
        (void)tlink_decoder_push(&d, 0x01 + (uint8_t)(i % 200), &fr);
    }
    CHECK(!tlink_decoder_push(&d, 0x00, &fr) && d.counters.too_long == 1, "over-long run counted too_long");
    for (i = 0; i < n; i++) {
        if (tlink_decoder_push(&d, enc[i], &fr)) {
            got++;
        }
    }
    CHECK(got == 2, "frame after the over-long run recovered");
    /* NULL pointers: refused, never dereferenced; a NULL out still counts */
    {
        tlink_pose_t pose;
        uint32_t ok0 = d.counters.frames_ok;
        memset(&pose, 0, sizeof pose);
        for (i = 0; i < n; i++) {
            (void)tlink_decoder_push(&d, enc[i], NULL);
        }
        CHECK(d.counters.frames_ok == ok0 + 1, "frame counted with out == NULL");
        CHECK(tlink_put_pose(NULL, 0, 0, enc, sizeof enc) == 0, "put with NULL message");
        CHECK(tlink_put_pose(&pose, 0, 0, NULL, sizeof enc) == 0, "put with NULL buffer");
        CHECK(!tlink_get_pose(NULL, &pose) && !tlink_get_pose(&fr, NULL), "get with NULL");
    }
}

/* ------------------------------------------------------------------ fuzz */
static void test_fuzz(long rounds)
{
    static uint8_t stream[1 << 16];
    uint8_t frames[4][TLINK_MAX_WIRE], payload[TLINK_MAX_PAYLOAD];
    size_t flen[4];
    long r, accepted_wrong = 0, intact_sent = 0, intact_got = 0;
    tlink_decoder_t d;
    tlink_frame_t fr;
    int k;
    tlink_decoder_init(&d);
    for (r = 0; r < rounds; r++) {
        size_t sn = 0, i, plen = rnd() % 80;
        for (k = 0; k < 4; k++) {
            for (i = 0; i < plen; i++) {
                payload[i] = (uint8_t)rnd();
            }
            flen[k] = tlink_encode(0x60 + (uint8_t)k, (uint16_t)r, (int64_t)r, payload, plen, frames[k], TLINK_MAX_WIRE);
        }
        /* frame 0 damaged (flip / insert / delete / truncate), frame 1 intact, 2 damaged, 3 intact */
        for (k = 0; k < 4; k++) {
            uint8_t tmp[TLINK_MAX_WIRE + 8];
            size_t tn = flen[k];
            memcpy(tmp, frames[k], tn);
            if ((k & 1) == 0) {
                uint32_t what = rnd() % 4, at = 1 + rnd() % (uint32_t)(tn - 2);
                if (what == 0) {
                    tmp[at] ^= (uint8_t)(1u << (rnd() % 8));
                } else if (what == 1) {
                    memmove(tmp + at + 1, tmp + at, tn - at);
                    tmp[at] = (uint8_t)rnd();
                    tn++;
                } else if (what == 2) {
                    memmove(tmp + at, tmp + at + 1, tn - at - 1);
                    tn--;
                } else {
                    tn = at; /* truncated: the next frame's leading delimiter ends it */
                }
            }
            memcpy(stream + sn, tmp, tn);
            sn += tn;
        }
        intact_sent += 2;
        for (i = 0; i < sn; i++) {
            if (tlink_decoder_push(&d, stream[i], &fr)) {
                int which = fr.type - 0x60;
                if (which < 0 || which > 3 || fr.len != plen) {
                    accepted_wrong++;
                    continue;
                }
                {
                    /* re-encode what was accepted: must equal the frame that was sent */
                    uint8_t re[TLINK_MAX_WIRE];
                    size_t rn = tlink_encode(fr.type, fr.seq, fr.t_us, fr.payload, fr.len, re, sizeof re);
                    if (rn != flen[which] || memcmp(re, frames[which], rn) != 0) {
                        accepted_wrong++;
                    } else if ((which & 1) == 1) {
                        intact_got++;
                    }
                }
            }
        }
    }
    CHECK(accepted_wrong == 0, "fuzz: %ld damaged frames accepted", accepted_wrong);
    CHECK(intact_got == intact_sent, "fuzz: %ld of %ld intact frames recovered", intact_got, intact_sent);
    printf("fuzz: %ld rounds, %ld intact frames recovered, %ld wrong accepted, counters ok=%lu crc=%lu cobs=%lu len=%lu\n",
           rounds, intact_got, accepted_wrong, (unsigned long)d.counters.frames_ok, (unsigned long)d.counters.bad_crc,
           (unsigned long)d.counters.bad_cobs, (unsigned long)d.counters.bad_length);
}

/* ------------------------------------------------------------------ benchmark */
static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static int bench(double seconds)
{
    static uint8_t stream[1 << 16];
    size_t sn = 0, i;
    tlink_pose_t p;
    tlink_decoder_t d;
    tlink_frame_t fr;
    double t0, t1;
    unsigned long passes = 0, frames = 0;
    memset(&p, 0, sizeof p);
    p.x_m = 12.5f;
    p.quality = TLINK_Q_TRACKING;
    while (sn + TLINK_MAX_WIRE < sizeof stream) {
        p.y_m += 0.25f;
        sn += tlink_put_pose(&p, (uint16_t)sn, (int64_t)sn, stream + sn, sizeof stream - sn);
    }
    tlink_decoder_init(&d);
    t0 = now_s();
    do {
        for (i = 0; i < sn; i++) {
            if (tlink_decoder_push(&d, stream[i], &fr)) {
                frames++;
            }
        }
        passes++;
        t1 = now_s();
    } while (t1 - t0 < seconds);
    printf("{\"c_decode_bytes_per_s\": %.0f, \"c_decode_frames_per_s\": %.0f, \"bytes\": %lu}\n",
           (double)sn * (double)passes / (t1 - t0), (double)frames / (t1 - t0), (unsigned long)(sn * passes));
    return d.counters.frames_ok == frames && d.counters.resyncs == 0 ? 0 : 1;
}

static int decode_stdin(void)
{
    static uint8_t chunk[4096];
    tlink_decoder_t d;
    tlink_frame_t fr;
    size_t n, i, k;
    tlink_decoder_init(&d);
    while ((n = fread(chunk, 1, sizeof chunk, stdin)) > 0) {
        for (i = 0; i < n; i++) {
            if (tlink_decoder_push(&d, chunk[i], &fr)) {
                printf("frame %u %u %lld ", (unsigned)fr.type, (unsigned)fr.seq, (long long)fr.t_us);
                for (k = 0; k < fr.len; k++) {
                    printf("%02x", fr.payload[k]);
                }
                printf("\n");
            }
        }
    }
    printf("counters bytes_in=%lu frames_ok=%lu bad_crc=%lu bad_cobs=%lu bad_length=%lu bad_version=%lu "
           "too_long=%lu unknown_type=%lu resyncs=%lu\n",
           (unsigned long)d.counters.bytes_in, (unsigned long)d.counters.frames_ok, (unsigned long)d.counters.bad_crc,
           (unsigned long)d.counters.bad_cobs, (unsigned long)d.counters.bad_length,
           (unsigned long)d.counters.bad_version, (unsigned long)d.counters.too_long,
           (unsigned long)d.counters.unknown_type, (unsigned long)d.counters.resyncs);
    return 0;
}

int main(int argc, char **argv)
{
    if (argc == 2 && strcmp(argv[1], "--decode") == 0) {
        return decode_stdin();
    }
    if (argc == 3 && strcmp(argv[1], "--bench") == 0) {
        return bench(atof(argv[2]));
    }
    if (argc != 2) {
        fprintf(stderr, "usage: %s VECTOR_DIR | --bench SECONDS\n", argv[0]);
        return 2;
    }
    test_crc();
    test_vectors(argv[1]);
    test_limits();
    test_fuzz(20000);
    printf("%d checks, %d failures\n", checks, failures);
    return failures == 0 ? 0 : 1;
}
