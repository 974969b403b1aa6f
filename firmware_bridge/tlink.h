/* tlink.h - portable C99 encoder/decoder of the tinyloc wire protocol, version 1.
 *
 * The protocol is specified in PROTOCOL.md beside this file. One header, one source
 * (tlink.c), optional tlink_config.h (define TLINK_USE_CONFIG to use it).
 *
 * Guarantees (checked by test_tlink.c under AddressSanitizer and UBSan):
 *  - no heap, no recursion, no global mutable state: every buffer belongs to the caller;
 *  - the decoder never writes past its own buffer and never reads past the byte it is given:
 *    at most TLINK_MAX_FRAME decoded bytes are held, whatever arrives;
 *  - work per received byte is bounded by a constant (incremental COBS and CRC-32; no scan
 *    of the buffer at the delimiter);
 *  - a frame is delivered only if its COBS stuffing, length, CRC-32 and version are all
 *    correct; anything else is counted and skipped, and the next delimiter starts afresh;
 *  - the encoder never writes more than `cap` bytes; errors are sticky: once a write does
 *    not fit, the rest of the frame is not written and the call returns 0;
 *  - NULL pointers are refused (false / 0), never dereferenced; `out` of tlink_decoder_push
 *    may be NULL when only the counters are wanted;
 *  - multi-byte fields are read and written byte by byte (little-endian on the wire,
 *    whatever the CPU's byte order or alignment rules).
 * Requirements: uint8_t..int64_t, and float as IEEE-754 binary32 (checked at compile time).
 */
#ifndef TLINK_H
#define TLINK_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#ifdef TLINK_USE_CONFIG
#include "tlink_config.h"
#endif

#ifndef TLINK_MAX_PAYLOAD
#define TLINK_MAX_PAYLOAD 200
#endif
#ifndef TLINK_CRC_TABLE
#define TLINK_CRC_TABLE 256
#endif

#define TLINK_PROTOCOL_VERSION 1
#define TLINK_HEADER_LEN 13
#define TLINK_CRC_LEN 4
#define TLINK_OVERHEAD (TLINK_HEADER_LEN + TLINK_CRC_LEN)
#define TLINK_MAX_FRAME (TLINK_OVERHEAD + TLINK_MAX_PAYLOAD)
/* COBS adds one code byte per block; frames are shorter than one 254-byte block. */
#define TLINK_MAX_ENCODED (TLINK_MAX_FRAME + 1)
/* Longest frame on the wire: leading delimiter + COBS + trailing delimiter. */
#define TLINK_MAX_WIRE (TLINK_MAX_ENCODED + 2)

#define TLINK_POSE_LEN 74
#define TLINK_STATUS_LEN 40
#define TLINK_TIMESYNC_LEN 28
#define TLINK_ODOMETRY_LEN 32
#define TLINK_IMU_LEN 28
#define TLINK_HEARTBEAT_LEN 20
#define TLINK_TEXT_LEN 24

#if TLINK_MAX_PAYLOAD > 200
#error "TLINK_MAX_PAYLOAD: the protocol allows at most 200 payload bytes"
#endif
#if TLINK_MAX_PAYLOAD < TLINK_POSE_LEN
#error "TLINK_MAX_PAYLOAD: must hold the largest message of protocol version 1 (pose, 74 bytes)"
#endif
#if TLINK_MAX_FRAME > 253
#error "TLINK_MAX_FRAME must fit in one COBS block (253 bytes)"
#endif
#if TLINK_CRC_TABLE != 0 && TLINK_CRC_TABLE != 16 && TLINK_CRC_TABLE != 256
#error "TLINK_CRC_TABLE must be 0, 16 or 256"
#endif

#ifdef __cplusplus
extern "C" {
#endif

/* Message types. */
enum {
    TLINK_TYPE_POSE = 0x01,      /* host -> MCU */
    TLINK_TYPE_STATUS = 0x02,    /* host -> MCU */
    TLINK_TYPE_TIMESYNC = 0x03,  /* either way */
    TLINK_TYPE_ODOMETRY = 0x10,  /* MCU -> host */
    TLINK_TYPE_IMU = 0x11,       /* MCU -> host */
    TLINK_TYPE_HEARTBEAT = 0x12  /* MCU -> host */
};

/* Pose quality (safety: anything but TRACKING must not be trusted as a plain fix). */
enum { TLINK_Q_NO_FIX = 0, TLINK_Q_SEARCHING = 1, TLINK_Q_TRACKING = 2, TLINK_Q_DEGRADED = 3 };

#define TLINK_LATLON_UNKNOWN INT32_MIN

/* A decoded frame. `payload` points into the decoder's buffer and stays valid until the
 * next call of tlink_decoder_push on that decoder. */
typedef struct {
    uint8_t type;
    uint16_t seq;
    int64_t t_us;            /* sensor timestamp, microseconds of the sender's clock */
    uint8_t len;             /* payload bytes */
    const uint8_t *payload;
} tlink_frame_t;

typedef struct {
    uint32_t bytes_in, frames_ok, bad_crc, bad_cobs, bad_length, bad_version, too_long, unknown_type, resyncs;
} tlink_counters_t;

typedef struct {
    uint8_t buf[TLINK_MAX_FRAME];
    uint16_t n;        /* decoded bytes held */
    uint8_t left;      /* data bytes left in the current COBS block */
    uint8_t code;      /* code byte of the current block; 0 before the first */
    uint8_t fault;     /* sticky within one frame: 0 none, else which counter */
    uint32_t crc;      /* CRC-32 register over the decoded bytes */
    tlink_counters_t counters;
} tlink_decoder_t;

/* Payloads, fields as in PROTOCOL.md. */
typedef struct {
    float x_m, y_m, yaw_rad;
    int32_t lat_e7, lon_e7;      /* 1e-7 degree; TLINK_LATLON_UNKNOWN when unknown */
    float cov[6];                /* xx, xy, xyaw, yy, yyaw, yawyaw (m^2, m*rad, rad^2) */
    float frame_ms;
    uint8_t quality;             /* TLINK_Q_* */
    char status[TLINK_TEXT_LEN]; /* ASCII, NUL-padded, not necessarily NUL-terminated */
} tlink_pose_t;

typedef struct {
    uint8_t state, quality;
    uint16_t flags;
    uint32_t frames_in, frames_dropped, link_errors;
    char text[TLINK_TEXT_LEN];
} tlink_status_t;

typedef struct {
    int64_t t_origin_us, t_receive_us, t_transmit_us;
    uint8_t phase;               /* 0 request, 1 reply */
} tlink_timesync_t;

typedef struct {
    float x_m, y_m, yaw_rad, speed_mps, yaw_rate_radps;
    int32_t left_ticks, right_ticks;
    uint8_t flags;
} tlink_odometry_t;

typedef struct {
    float f[3];                  /* specific force, FLU base frame, m/s^2 */
    float gyro[3];               /* rad/s, NaN when absent */
    uint8_t flags;
} tlink_imu_t;

typedef struct {
    uint32_t uptime_ms, rx_ok, rx_bad_crc, rx_resyncs;
    uint8_t state, reset_cause;
    uint16_t flags;
} tlink_heartbeat_t;

/* CRC-32/ISO-HDLC (poly 0x04C11DB7 reflected, init and xorout 0xFFFFFFFF). */
uint32_t tlink_crc32(const uint8_t *data, size_t n);

/* ---- decoding ---- */
void tlink_decoder_init(tlink_decoder_t *d);
/* Feed one received byte. Returns true when it completes a valid frame, described in *out. */
bool tlink_decoder_push(tlink_decoder_t *d, uint8_t byte, tlink_frame_t *out);

/* Typed views of a frame; false if the type differs or the payload is too short.
 * Longer payloads are accepted (later revisions may append fields). */
bool tlink_get_pose(const tlink_frame_t *f, tlink_pose_t *m);
bool tlink_get_status(const tlink_frame_t *f, tlink_status_t *m);
bool tlink_get_timesync(const tlink_frame_t *f, tlink_timesync_t *m);
bool tlink_get_odometry(const tlink_frame_t *f, tlink_odometry_t *m);
bool tlink_get_imu(const tlink_frame_t *f, tlink_imu_t *m);
bool tlink_get_heartbeat(const tlink_frame_t *f, tlink_heartbeat_t *m);

/* ---- encoding: each writes one complete wire frame (with both delimiters) into out[0..cap)
 * and returns its length, or 0 if it does not fit (TLINK_MAX_WIRE always fits). ---- */
size_t tlink_encode(uint8_t type, uint16_t seq, int64_t t_us, const uint8_t *payload, size_t len,
                    uint8_t *out, size_t cap);
size_t tlink_put_pose(const tlink_pose_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);
size_t tlink_put_status(const tlink_status_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);
size_t tlink_put_timesync(const tlink_timesync_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);
size_t tlink_put_odometry(const tlink_odometry_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);
size_t tlink_put_imu(const tlink_imu_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);
size_t tlink_put_heartbeat(const tlink_heartbeat_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap);

#ifdef __cplusplus
}
#endif

#endif /* TLINK_H */
