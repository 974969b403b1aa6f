/* tlink.c - see tlink.h and PROTOCOL.md. C99, no heap, no recursion. */
#include "tlink.h"

#include <float.h>
#include <string.h>

/* Compile-time checks: float must be IEEE-754 binary32 for the bit copies below. */
typedef char tlink_check_float_size[(sizeof(float) == 4) ? 1 : -1];
typedef char tlink_check_float_mant[(FLT_MANT_DIG == 24 && FLT_MAX_EXP == 128) ? 1 : -1];

#define CRC_INIT 0xFFFFFFFFu
#define CRC_XOROUT 0xFFFFFFFFu
#define CRC_POLY_REFLECTED 0xEDB88320u
#define CRC_RESIDUE 0xDEBB20E3u /* register after data + its CRC (little-endian), before xorout */

/* Fault codes (sticky within one frame). */
enum { F_NONE = 0, F_TOO_LONG, F_BAD_COBS };

/* ------------------------------------------------------------------ CRC-32 */
#if TLINK_CRC_TABLE == 256
static const uint32_t crc_table[256] = {
    0x00000000u, 0x77073096u, 0xEE0E612Cu, 0x990951BAu, 0x076DC419u, 0x706AF48Fu, 0xE963A535u, 0x9E6495A3u,
    0x0EDB8832u, 0x79DCB8A4u, 0xE0D5E91Eu, 0x97D2D988u, 0x09B64C2Bu, 0x7EB17CBDu, 0xE7B82D07u, 0x90BF1D91u,
    0x1DB71064u, 0x6AB020F2u, 0xF3B97148u, 0x84BE41DEu, 0x1ADAD47Du, 0x6DDDE4EBu, 0xF4D4B551u, 0x83D385C7u,
    0x136C9856u, 0x646BA8C0u, 0xFD62F97Au, 0x8A65C9ECu, 0x14015C4Fu, 0x63066CD9u, 0xFA0F3D63u, 0x8D080DF5u,
    0x3B6E20C8u, 0x4C69105Eu, 0xD56041E4u, 0xA2677172u, 0x3C03E4D1u, 0x4B04D447u, 0xD20D85FDu, 0xA50AB56Bu,
    0x35B5A8FAu, 0x42B2986Cu, 0xDBBBC9D6u, 0xACBCF940u, 0x32D86CE3u, 0x45DF5C75u, 0xDCD60DCFu, 0xABD13D59u,
    0x26D930ACu, 0x51DE003Au, 0xC8D75180u, 0xBFD06116u, 0x21B4F4B5u, 0x56B3C423u, 0xCFBA9599u, 0xB8BDA50Fu,
    0x2802B89Eu, 0x5F058808u, 0xC60CD9B2u, 0xB10BE924u, 0x2F6F7C87u, 0x58684C11u, 0xC1611DABu, 0xB6662D3Du,
    0x76DC4190u, 0x01DB7106u, 0x98D220BCu, 0xEFD5102Au, 0x71B18589u, 0x06B6B51Fu, 0x9FBFE4A5u, 0xE8B8D433u,
    0x7807C9A2u, 0x0F00F934u, 0x9609A88Eu, 0xE10E9818u, 0x7F6A0DBBu, 0x086D3D2Du, 0x91646C97u, 0xE6635C01u,
    0x6B6B51F4u, 0x1C6C6162u, 0x856530D8u, 0xF262004Eu, 0x6C0695EDu, 0x1B01A57Bu, 0x8208F4C1u, 0xF50FC457u,
    0x65B0D9C6u, 0x12B7E950u, 0x8BBEB8EAu, 0xFCB9887Cu, 0x62DD1DDFu, 0x15DA2D49u, 0x8CD37CF3u, 0xFBD44C65u,
    0x4DB26158u, 0x3AB551CEu, 0xA3BC0074u, 0xD4BB30E2u, 0x4ADFA541u, 0x3DD895D7u, 0xA4D1C46Du, 0xD3D6F4FBu,
    0x4369E96Au, 0x346ED9FCu, 0xAD678846u, 0xDA60B8D0u, 0x44042D73u, 0x33031DE5u, 0xAA0A4C5Fu, 0xDD0D7CC9u,
    0x5005713Cu, 0x270241AAu, 0xBE0B1010u, 0xC90C2086u, 0x5768B525u, 0x206F85B3u, 0xB966D409u, 0xCE61E49Fu,
    0x5EDEF90Eu, 0x29D9C998u, 0xB0D09822u, 0xC7D7A8B4u, 0x59B33D17u, 0x2EB40D81u, 0xB7BD5C3Bu, 0xC0BA6CADu,
    0xEDB88320u, 0x9ABFB3B6u, 0x03B6E20Cu, 0x74B1D29Au, 0xEAD54739u, 0x9DD277AFu, 0x04DB2615u, 0x73DC1683u,
    0xE3630B12u, 0x94643B84u, 0x0D6D6A3Eu, 0x7A6A5AA8u, 0xE40ECF0Bu, 0x9309FF9Du, 0x0A00AE27u, 0x7D079EB1u,
    0xF00F9344u, 0x8708A3D2u, 0x1E01F268u, 0x6906C2FEu, 0xF762575Du, 0x806567CBu, 0x196C3671u, 0x6E6B06E7u,
    0xFED41B76u, 0x89D32BE0u, 0x10DA7A5Au, 0x67DD4ACCu, 0xF9B9DF6Fu, 0x8EBEEFF9u, 0x17B7BE43u, 0x60B08ED5u,
    0xD6D6A3E8u, 0xA1D1937Eu, 0x38D8C2C4u, 0x4FDFF252u, 0xD1BB67F1u, 0xA6BC5767u, 0x3FB506DDu, 0x48B2364Bu,
    0xD80D2BDAu, 0xAF0A1B4Cu, 0x36034AF6u, 0x41047A60u, 0xDF60EFC3u, 0xA867DF55u, 0x316E8EEFu, 0x4669BE79u,
    0xCB61B38Cu, 0xBC66831Au, 0x256FD2A0u, 0x5268E236u, 0xCC0C7795u, 0xBB0B4703u, 0x220216B9u, 0x5505262Fu,
    0xC5BA3BBEu, 0xB2BD0B28u, 0x2BB45A92u, 0x5CB36A04u, 0xC2D7FFA7u, 0xB5D0CF31u, 0x2CD99E8Bu, 0x5BDEAE1Du,
    0x9B64C2B0u, 0xEC63F226u, 0x756AA39Cu, 0x026D930Au, 0x9C0906A9u, 0xEB0E363Fu, 0x72076785u, 0x05005713u,
    0x95BF4A82u, 0xE2B87A14u, 0x7BB12BAEu, 0x0CB61B38u, 0x92D28E9Bu, 0xE5D5BE0Du, 0x7CDCEFB7u, 0x0BDBDF21u,
    0x86D3D2D4u, 0xF1D4E242u, 0x68DDB3F8u, 0x1FDA836Eu, 0x81BE16CDu, 0xF6B9265Bu, 0x6FB077E1u, 0x18B74777u,
    0x88085AE6u, 0xFF0F6A70u, 0x66063BCAu, 0x11010B5Cu, 0x8F659EFFu, 0xF862AE69u, 0x616BFFD3u, 0x166CCF45u,
    0xA00AE278u, 0xD70DD2EEu, 0x4E048354u, 0x3903B3C2u, 0xA7672661u, 0xD06016F7u, 0x4969474Du, 0x3E6E77DBu,
    0xAED16A4Au, 0xD9D65ADCu, 0x40DF0B66u, 0x37D83BF0u, 0xA9BCAE53u, 0xDEBB9EC5u, 0x47B2CF7Fu, 0x30B5FFE9u,
    0xBDBDF21Cu, 0xCABAC28Au, 0x53B39330u, 0x24B4A3A6u, 0xBAD03605u, 0xCDD70693u, 0x54DE5729u, 0x23D967BFu,
    0xB3667A2Eu, 0xC4614AB8u, 0x5D681B02u, 0x2A6F2B94u, 0xB40BBE37u, 0xC30C8EA1u, 0x5A05DF1Bu, 0x2D02EF8Du};

static uint32_t crc_step(uint32_t reg, uint8_t b) { return (reg >> 8) ^ crc_table[(reg ^ b) & 0xFFu]; }
#elif TLINK_CRC_TABLE == 16
static const uint32_t crc_nibble[16] = {
    0x00000000u, 0x1DB71064u, 0x3B6E20C8u, 0x26D930ACu, 0x76DC4190u, 0x6B6B51F4u, 0x4DB26158u, 0x5005713Cu,
    0xEDB88320u, 0xF00F9344u, 0xD6D6A3E8u, 0xCB61B38Cu, 0x9B64C2B0u, 0x86D3D2D4u, 0xA00AE278u, 0xBDBDF21Cu};

static uint32_t crc_step(uint32_t reg, uint8_t b)
{
    reg ^= b;
    reg = (reg >> 4) ^ crc_nibble[reg & 0x0Fu];
    reg = (reg >> 4) ^ crc_nibble[reg & 0x0Fu];
    return reg;
}
#else
static uint32_t crc_step(uint32_t reg, uint8_t b)
{
    int k;
    reg ^= b;
    for (k = 0; k < 8; k++) {
        reg = (reg & 1u) ? (reg >> 1) ^ CRC_POLY_REFLECTED : reg >> 1;
    }
    return reg;
}
#endif

uint32_t tlink_crc32(const uint8_t *data, size_t n)
{
    uint32_t reg = CRC_INIT;
    size_t i;
    for (i = 0; i < n; i++) {
        reg = crc_step(reg, data[i]);
    }
    return reg ^ CRC_XOROUT;
}

/* ------------------------------------------------------------------ little-endian helpers */
static uint16_t rd_u16(const uint8_t *p) { return (uint16_t)(p[0] | ((uint16_t)p[1] << 8)); }
static uint32_t rd_u32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
}
static int32_t rd_i32(const uint8_t *p)
{
    uint32_t u = rd_u32(p);
    int32_t v;
    memcpy(&v, &u, sizeof v); /* two's complement assumed (int32_t is exact-width) */
    return v;
}
static int64_t rd_i64(const uint8_t *p)
{
    uint64_t u = (uint64_t)rd_u32(p) | ((uint64_t)rd_u32(p + 4) << 32);
    int64_t v;
    memcpy(&v, &u, sizeof v);
    return v;
}
static float rd_f32(const uint8_t *p)
{
    uint32_t u = rd_u32(p);
    float f;
    memcpy(&f, &u, sizeof f);
    return f;
}
static void wr_u16(uint8_t *p, uint16_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)(v >> 8);
}
static void wr_u32(uint8_t *p, uint32_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)((v >> 8) & 0xFFu);
    p[2] = (uint8_t)((v >> 16) & 0xFFu);
    p[3] = (uint8_t)(v >> 24);
}
static void wr_i32(uint8_t *p, int32_t v)
{
    uint32_t u;
    memcpy(&u, &v, sizeof u);
    wr_u32(p, u);
}
static void wr_i64(uint8_t *p, int64_t v)
{
    uint64_t u;
    memcpy(&u, &v, sizeof u);
    wr_u32(p, (uint32_t)(u & 0xFFFFFFFFu));
    wr_u32(p + 4, (uint32_t)(u >> 32));
}
static void wr_f32(uint8_t *p, float f)
{
    uint32_t u;
    memcpy(&u, &f, sizeof u);
    wr_u32(p, u);
}

/* Minimum payload length of a known type, 0 for unknown types. */
static uint8_t layout_len(uint8_t type)
{
    switch (type) {
    case TLINK_TYPE_POSE: return TLINK_POSE_LEN;
    case TLINK_TYPE_STATUS: return TLINK_STATUS_LEN;
    case TLINK_TYPE_TIMESYNC: return TLINK_TIMESYNC_LEN;
    case TLINK_TYPE_ODOMETRY: return TLINK_ODOMETRY_LEN;
    case TLINK_TYPE_IMU: return TLINK_IMU_LEN;
    case TLINK_TYPE_HEARTBEAT: return TLINK_HEARTBEAT_LEN;
    default: return 0;
    }
}

/* ------------------------------------------------------------------ decoder */
static void dec_restart(tlink_decoder_t *d)
{
    d->n = 0;
    d->left = 0;
    d->code = 0;
    d->fault = F_NONE;
    d->crc = CRC_INIT;
}

void tlink_decoder_init(tlink_decoder_t *d)
{
    memset(d, 0, sizeof *d);
    dec_restart(d);
}

static void dec_emit(tlink_decoder_t *d, uint8_t b)
{
    if (d->fault != F_NONE) {
        return;
    }
    if (d->n >= TLINK_MAX_FRAME) {
        d->fault = F_TOO_LONG;
        return;
    }
    d->buf[d->n++] = b;
    d->crc = crc_step(d->crc, b);
}

/* Called at a delimiter with a non-empty run; returns true if the frame is valid. */
static bool dec_finish(tlink_decoder_t *d, tlink_frame_t *out)
{
    tlink_counters_t *c = &d->counters;
    uint8_t plen, need;
    if (d->fault == F_TOO_LONG) {
        c->too_long++;
        return false;
    }
    if (d->left != 0) {
        c->bad_cobs++; /* the last block promised more bytes than arrived */
        return false;
    }
    if (d->n < TLINK_OVERHEAD) {
        c->bad_length++;
        return false;
    }
    if (d->crc != CRC_RESIDUE) {
        c->bad_crc++;
        return false;
    }
    if (d->buf[0] != TLINK_PROTOCOL_VERSION) {
        c->bad_version++;
        return false;
    }
    plen = d->buf[12];
    if ((uint16_t)plen != (uint16_t)(d->n - TLINK_OVERHEAD) || plen > TLINK_MAX_PAYLOAD) {
        c->bad_length++;
        return false;
    }
    need = layout_len(d->buf[1]);
    if (plen < need) {
        c->bad_length++;
        return false;
    }
    out->type = d->buf[1];
    out->seq = rd_u16(d->buf + 2);
    out->t_us = rd_i64(d->buf + 4);
    out->len = plen;
    out->payload = d->buf + TLINK_HEADER_LEN;
    c->frames_ok++;
    if (need == 0) {
        c->unknown_type++;
    }
    return true;
}

bool tlink_decoder_push(tlink_decoder_t *d, uint8_t byte, tlink_frame_t *out)
{
    tlink_frame_t scratch; /* lets a caller that only wants the counters pass out == NULL */
    bool ok;
    d->counters.bytes_in++;
    if (byte == 0x00) {
        if (d->code == 0 && d->fault == F_NONE) {
            return false; /* empty run between delimiters: idle line, not an error */
        }
        ok = dec_finish(d, out != NULL ? out : &scratch);
        if (!ok) {
            d->counters.resyncs++;
        }
        dec_restart(d);
        return ok;
    }
    if (d->left == 0) {
        /* A code byte: the previous block (if any, and if not a full 0xFF block) ended in a zero. */
        if (d->code != 0 && d->code != 0xFFu) {
            dec_emit(d, 0x00);
        }
        d->code = byte;
        d->left = (uint8_t)(byte - 1u);
    } else {
        dec_emit(d, byte);
        d->left--;
    }
    return false;
}

/* ------------------------------------------------------------------ encoder */
typedef struct {
    uint8_t *out;
    size_t cap, len, code_pos;
    uint8_t code;
    uint32_t crc;
    bool fault; /* sticky */
} enc_t;

static void enc_raw(enc_t *e, uint8_t b)
{
    if (e->fault || e->len >= e->cap) {
        e->fault = true;
        return;
    }
    e->out[e->len++] = b;
}

static void enc_begin(enc_t *e, uint8_t *out, size_t cap)
{
    e->out = out;
    e->cap = cap;
    e->len = 0;
    e->fault = false;
    e->crc = CRC_INIT;
    enc_raw(e, 0x00);     /* leading delimiter flushes any noise before the frame */
    e->code_pos = e->len;
    enc_raw(e, 0x01);     /* placeholder for the first code byte */
    e->code = 1;
}

/* One frame byte through COBS (frames are < 254 bytes, so no 0xFF blocks arise). */
static void enc_put(enc_t *e, uint8_t b, bool crc)
{
    if (crc) {
        e->crc = crc_step(e->crc, b);
    }
    if (b == 0x00) {
        if (!e->fault) {
            e->out[e->code_pos] = e->code;
        }
        e->code_pos = e->len;
        enc_raw(e, 0x01);
        e->code = 1;
    } else {
        enc_raw(e, b);
        e->code++;
    }
}

static size_t enc_end(enc_t *e)
{
    uint32_t c = e->crc ^ CRC_XOROUT;
    enc_put(e, (uint8_t)(c & 0xFFu), false);
    enc_put(e, (uint8_t)((c >> 8) & 0xFFu), false);
    enc_put(e, (uint8_t)((c >> 16) & 0xFFu), false);
    enc_put(e, (uint8_t)(c >> 24), false);
    if (!e->fault) {
        e->out[e->code_pos] = e->code;
    }
    enc_raw(e, 0x00);
    return e->fault ? 0u : e->len;
}

size_t tlink_encode(uint8_t type, uint16_t seq, int64_t t_us, const uint8_t *payload, size_t len,
                    uint8_t *out, size_t cap)
{
    enc_t e;
    uint8_t hdr[TLINK_HEADER_LEN];
    size_t i;
    if (len > TLINK_MAX_PAYLOAD || (len > 0 && payload == NULL) || out == NULL) {
        return 0;
    }
    hdr[0] = TLINK_PROTOCOL_VERSION;
    hdr[1] = type;
    wr_u16(hdr + 2, seq);
    wr_i64(hdr + 4, t_us);
    hdr[12] = (uint8_t)len;
    enc_begin(&e, out, cap);
    for (i = 0; i < TLINK_HEADER_LEN; i++) {
        enc_put(&e, hdr[i], true);
    }
    for (i = 0; i < len; i++) {
        enc_put(&e, payload[i], true);
    }
    return enc_end(&e);
}

/* ------------------------------------------------------------------ typed messages */
static void put_text(uint8_t *p, const char *s)
{
    size_t i;
    for (i = 0; i < TLINK_TEXT_LEN; i++) {
        p[i] = (uint8_t)s[i];
    }
}
static void get_text(char *s, const uint8_t *p)
{
    size_t i;
    for (i = 0; i < TLINK_TEXT_LEN; i++) {
        s[i] = (char)p[i];
    }
}

static bool get_pose(const tlink_frame_t *f, tlink_pose_t *m)
{
    const uint8_t *p = f->payload;
    int k;
    if (f->type != TLINK_TYPE_POSE || f->len < TLINK_POSE_LEN) {
        return false;
    }
    m->x_m = rd_f32(p);
    m->y_m = rd_f32(p + 4);
    m->yaw_rad = rd_f32(p + 8);
    m->lat_e7 = rd_i32(p + 12);
    m->lon_e7 = rd_i32(p + 16);
    for (k = 0; k < 6; k++) {
        m->cov[k] = rd_f32(p + 20 + 4 * k);
    }
    m->frame_ms = rd_f32(p + 44);
    m->quality = p[48];
    get_text(m->status, p + 50);
    return true;
}

static size_t put_pose(const tlink_pose_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_POSE_LEN];
    int k;
    wr_f32(p, m->x_m);
    wr_f32(p + 4, m->y_m);
    wr_f32(p + 8, m->yaw_rad);
    wr_i32(p + 12, m->lat_e7);
    wr_i32(p + 16, m->lon_e7);
    for (k = 0; k < 6; k++) {
        wr_f32(p + 20 + 4 * k, m->cov[k]);
    }
    wr_f32(p + 44, m->frame_ms);
    p[48] = m->quality;
    p[49] = 0;
    put_text(p + 50, m->status);
    return tlink_encode(TLINK_TYPE_POSE, seq, t_us, p, sizeof p, out, cap);
}

static bool get_status(const tlink_frame_t *f, tlink_status_t *m)
{
    const uint8_t *p = f->payload;
    if (f->type != TLINK_TYPE_STATUS || f->len < TLINK_STATUS_LEN) {
        return false;
    }
    m->state = p[0];
    m->quality = p[1];
    m->flags = rd_u16(p + 2);
    m->frames_in = rd_u32(p + 4);
    m->frames_dropped = rd_u32(p + 8);
    m->link_errors = rd_u32(p + 12);
    get_text(m->text, p + 16);
    return true;
}

static size_t put_status(const tlink_status_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_STATUS_LEN];
    p[0] = m->state;
    p[1] = m->quality;
    wr_u16(p + 2, m->flags);
    wr_u32(p + 4, m->frames_in);
    wr_u32(p + 8, m->frames_dropped);
    wr_u32(p + 12, m->link_errors);
    put_text(p + 16, m->text);
    return tlink_encode(TLINK_TYPE_STATUS, seq, t_us, p, sizeof p, out, cap);
}

static bool get_timesync(const tlink_frame_t *f, tlink_timesync_t *m)
{
    const uint8_t *p = f->payload;
    if (f->type != TLINK_TYPE_TIMESYNC || f->len < TLINK_TIMESYNC_LEN || p[24] > 1u) {
        return false;
    }
    m->t_origin_us = rd_i64(p);
    m->t_receive_us = rd_i64(p + 8);
    m->t_transmit_us = rd_i64(p + 16);
    m->phase = p[24];
    return true;
}

static size_t put_timesync(const tlink_timesync_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_TIMESYNC_LEN];
    memset(p, 0, sizeof p);
    wr_i64(p, m->t_origin_us);
    wr_i64(p + 8, m->t_receive_us);
    wr_i64(p + 16, m->t_transmit_us);
    p[24] = m->phase;
    return tlink_encode(TLINK_TYPE_TIMESYNC, seq, t_us, p, sizeof p, out, cap);
}

static bool get_odometry(const tlink_frame_t *f, tlink_odometry_t *m)
{
    const uint8_t *p = f->payload;
    if (f->type != TLINK_TYPE_ODOMETRY || f->len < TLINK_ODOMETRY_LEN) {
        return false;
    }
    m->x_m = rd_f32(p);
    m->y_m = rd_f32(p + 4);
    m->yaw_rad = rd_f32(p + 8);
    m->speed_mps = rd_f32(p + 12);
    m->yaw_rate_radps = rd_f32(p + 16);
    m->left_ticks = rd_i32(p + 20);
    m->right_ticks = rd_i32(p + 24);
    m->flags = p[28];
    return true;
}

static size_t put_odometry(const tlink_odometry_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_ODOMETRY_LEN];
    memset(p, 0, sizeof p);
    wr_f32(p, m->x_m);
    wr_f32(p + 4, m->y_m);
    wr_f32(p + 8, m->yaw_rad);
    wr_f32(p + 12, m->speed_mps);
    wr_f32(p + 16, m->yaw_rate_radps);
    wr_i32(p + 20, m->left_ticks);
    wr_i32(p + 24, m->right_ticks);
    p[28] = m->flags;
    return tlink_encode(TLINK_TYPE_ODOMETRY, seq, t_us, p, sizeof p, out, cap);
}

static bool get_imu(const tlink_frame_t *f, tlink_imu_t *m)
{
    const uint8_t *p = f->payload;
    int k;
    if (f->type != TLINK_TYPE_IMU || f->len < TLINK_IMU_LEN) {
        return false;
    }
    for (k = 0; k < 3; k++) {
        m->f[k] = rd_f32(p + 4 * k);
        m->gyro[k] = rd_f32(p + 12 + 4 * k);
    }
    m->flags = p[24];
    return true;
}

static size_t put_imu(const tlink_imu_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_IMU_LEN];
    int k;
    memset(p, 0, sizeof p);
    for (k = 0; k < 3; k++) {
        wr_f32(p + 4 * k, m->f[k]);
        wr_f32(p + 12 + 4 * k, m->gyro[k]);
    }
    p[24] = m->flags;
    return tlink_encode(TLINK_TYPE_IMU, seq, t_us, p, sizeof p, out, cap);
}

static bool get_heartbeat(const tlink_frame_t *f, tlink_heartbeat_t *m)
{
    const uint8_t *p = f->payload;
    if (f->type != TLINK_TYPE_HEARTBEAT || f->len < TLINK_HEARTBEAT_LEN) {
        return false;
    }
    m->uptime_ms = rd_u32(p);
    m->rx_ok = rd_u32(p + 4);
    m->rx_bad_crc = rd_u32(p + 8);
    m->rx_resyncs = rd_u32(p + 12);
    m->state = p[16];
    m->reset_cause = p[17];
    m->flags = rd_u16(p + 18);
    return true;
}

static size_t put_heartbeat(const tlink_heartbeat_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    uint8_t p[TLINK_HEARTBEAT_LEN];
    wr_u32(p, m->uptime_ms);
    wr_u32(p + 4, m->rx_ok);
    wr_u32(p + 8, m->rx_bad_crc);
    wr_u32(p + 12, m->rx_resyncs);
    p[16] = m->state;
    p[17] = m->reset_cause;
    wr_u16(p + 18, m->flags);
    return tlink_encode(TLINK_TYPE_HEARTBEAT, seq, t_us, p, sizeof p, out, cap);
}

size_t tlink_put_pose(const tlink_pose_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_pose(m, seq, t_us, out, cap);
}

bool tlink_get_pose(const tlink_frame_t *f, tlink_pose_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_pose(f, m);
}

size_t tlink_put_status(const tlink_status_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_status(m, seq, t_us, out, cap);
}

bool tlink_get_status(const tlink_frame_t *f, tlink_status_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_status(f, m);
}

size_t tlink_put_timesync(const tlink_timesync_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_timesync(m, seq, t_us, out, cap);
}

bool tlink_get_timesync(const tlink_frame_t *f, tlink_timesync_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_timesync(f, m);
}

size_t tlink_put_odometry(const tlink_odometry_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_odometry(m, seq, t_us, out, cap);
}

bool tlink_get_odometry(const tlink_frame_t *f, tlink_odometry_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_odometry(f, m);
}

size_t tlink_put_imu(const tlink_imu_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_imu(m, seq, t_us, out, cap);
}

bool tlink_get_imu(const tlink_frame_t *f, tlink_imu_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_imu(f, m);
}

size_t tlink_put_heartbeat(const tlink_heartbeat_t *m, uint16_t seq, int64_t t_us, uint8_t *out, size_t cap)
{
    return m == NULL ? 0u : put_heartbeat(m, seq, t_us, out, cap);
}

bool tlink_get_heartbeat(const tlink_frame_t *f, tlink_heartbeat_t *m)
{
    return f != NULL && m != NULL && f->payload != NULL && get_heartbeat(f, m);
}
