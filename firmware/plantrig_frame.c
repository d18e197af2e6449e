/* plantrig binary frames: see plantrig_frame.h and docs/protocol.md. */
#include "plantrig_frame.h"

#include <string.h>

/* The float32 payload is copied bit for bit; a float of another size cannot be sent. */
typedef char pr_float_is_32_bits[(sizeof(float) == 4) ? 1 : -1];

/* CRC-16/CCITT-FALSE table: entry i is the register after shifting byte i MSB first
 * through poly 0x1021 (the same table io/_crc.py builds). */
static const uint16_t pr_crc_table[256] = {
    0x0000, 0x1021, 0x2042, 0x3063, 0x4084, 0x50A5, 0x60C6, 0x70E7, 0x8108, 0x9129, 0xA14A,
    0xB16B, 0xC18C, 0xD1AD, 0xE1CE, 0xF1EF, 0x1231, 0x0210, 0x3273, 0x2252, 0x52B5, 0x4294,
    0x72F7, 0x62D6, 0x9339, 0x8318, 0xB37B, 0xA35A, 0xD3BD, 0xC39C, 0xF3FF, 0xE3DE, 0x2462,
    0x3443, 0x0420, 0x1401, 0x64E6, 0x74C7, 0x44A4, 0x5485, 0xA56A, 0xB54B, 0x8528, 0x9509,
    0xE5EE, 0xF5CF, 0xC5AC, 0xD58D, 0x3653, 0x2672, 0x1611, 0x0630, 0x76D7, 0x66F6, 0x5695,
    0x46B4, 0xB75B, 0xA77A, 0x9719, 0x8738, 0xF7DF, 0xE7FE, 0xD79D, 0xC7BC, 0x48C4, 0x58E5,
    0x6886, 0x78A7, 0x0840, 0x1861, 0x2802, 0x3823, 0xC9CC, 0xD9ED, 0xE98E, 0xF9AF, 0x8948,
    0x9969, 0xA90A, 0xB92B, 0x5AF5, 0x4AD4, 0x7AB7, 0x6A96, 0x1A71, 0x0A50, 0x3A33, 0x2A12,
    0xDBFD, 0xCBDC, 0xFBBF, 0xEB9E, 0x9B79, 0x8B58, 0xBB3B, 0xAB1A, 0x6CA6, 0x7C87, 0x4CE4,
    0x5CC5, 0x2C22, 0x3C03, 0x0C60, 0x1C41, 0xEDAE, 0xFD8F, 0xCDEC, 0xDDCD, 0xAD2A, 0xBD0B,
    0x8D68, 0x9D49, 0x7E97, 0x6EB6, 0x5ED5, 0x4EF4, 0x3E13, 0x2E32, 0x1E51, 0x0E70, 0xFF9F,
    0xEFBE, 0xDFDD, 0xCFFC, 0xBF1B, 0xAF3A, 0x9F59, 0x8F78, 0x9188, 0x81A9, 0xB1CA, 0xA1EB,
    0xD10C, 0xC12D, 0xF14E, 0xE16F, 0x1080, 0x00A1, 0x30C2, 0x20E3, 0x5004, 0x4025, 0x7046,
    0x6067, 0x83B9, 0x9398, 0xA3FB, 0xB3DA, 0xC33D, 0xD31C, 0xE37F, 0xF35E, 0x02B1, 0x1290,
    0x22F3, 0x32D2, 0x4235, 0x5214, 0x6277, 0x7256, 0xB5EA, 0xA5CB, 0x95A8, 0x8589, 0xF56E,
    0xE54F, 0xD52C, 0xC50D, 0x34E2, 0x24C3, 0x14A0, 0x0481, 0x7466, 0x6447, 0x5424, 0x4405,
    0xA7DB, 0xB7FA, 0x8799, 0x97B8, 0xE75F, 0xF77E, 0xC71D, 0xD73C, 0x26D3, 0x36F2, 0x0691,
    0x16B0, 0x6657, 0x7676, 0x4615, 0x5634, 0xD94C, 0xC96D, 0xF90E, 0xE92F, 0x99C8, 0x89E9,
    0xB98A, 0xA9AB, 0x5844, 0x4865, 0x7806, 0x6827, 0x18C0, 0x08E1, 0x3882, 0x28A3, 0xCB7D,
    0xDB5C, 0xEB3F, 0xFB1E, 0x8BF9, 0x9BD8, 0xABBB, 0xBB9A, 0x4A75, 0x5A54, 0x6A37, 0x7A16,
    0x0AF1, 0x1AD0, 0x2AB3, 0x3A92, 0xFD2E, 0xED0F, 0xDD6C, 0xCD4D, 0xBDAA, 0xAD8B, 0x9DE8,
    0x8DC9, 0x7C26, 0x6C07, 0x5C64, 0x4C45, 0x3CA2, 0x2C83, 0x1CE0, 0x0CC1, 0xEF1F, 0xFF3E,
    0xCF5D, 0xDF7C, 0xAF9B, 0xBFBA, 0x8FD9, 0x9FF8, 0x6E17, 0x7E36, 0x4E55, 0x5E74, 0x2E93,
    0x3EB2, 0x0ED1, 0x1EF0};

uint16_t pr_crc16(uint16_t crc, const uint8_t *data, size_t len)
{
    size_t i;
    for (i = 0; i < len; ++i) {
        crc = (uint16_t)((crc << 8) ^ pr_crc_table[((crc >> 8) ^ data[i]) & 0xFFu]);
    }
    return crc;
}

size_t pr_cobs_encode(const uint8_t *src, size_t len, uint8_t *dst, size_t dst_cap)
{
    size_t code_at = 0; /* where the current block's code byte goes */
    size_t out = 1;
    uint8_t code = 1;
    size_t i;

    if (dst_cap < 1) {
        return 0;
    }
    for (i = 0; i < len; ++i) {
        if (src[i] == 0) {
            dst[code_at] = code;
            code_at = out++;
            code = 1;
        } else {
            if (out >= dst_cap) {
                return 0;
            }
            dst[out++] = src[i];
            ++code;
            /* a full block of 254 bytes implies no zero; start a new block unless done */
            if (code == 0xFF && i + 1 < len) {
                dst[code_at] = code;
                code_at = out++;
                code = 1;
            }
        }
        if (code_at >= dst_cap) {
            return 0;
        }
    }
    dst[code_at] = code;
    return out;
}

int pr_cobs_decode(const uint8_t *src, size_t len, uint8_t *dst, size_t dst_cap,
                   size_t *out_len)
{
    size_t i = 0;
    size_t out = 0;
    size_t k;

    if (len == 0) {
        return PR_ERR_COBS;
    }
    for (k = 0; k < len; ++k) {
        if (src[k] == 0) {
            return PR_ERR_COBS;
        }
    }
    while (i < len) {
        uint8_t code = src[i];
        size_t end = i + code;
        if (end > len) {
            return PR_ERR_COBS;
        }
        if (out + (size_t)(code - 1u) > dst_cap) {
            return PR_ERR_BUFFER;
        }
        memcpy(dst + out, src + i + 1, (size_t)(code - 1u));
        out += (size_t)(code - 1u);
        i = end;
        if (code < 0xFFu && i < len) {
            if (out >= dst_cap) {
                return PR_ERR_BUFFER;
            }
            dst[out++] = 0;
        }
    }
    *out_len = out;
    return PR_OK;
}

static void put_u16(uint8_t *p, uint16_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)(v >> 8);
}

static void put_u32(uint8_t *p, uint32_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)((v >> 8) & 0xFFu);
    p[2] = (uint8_t)((v >> 16) & 0xFFu);
    p[3] = (uint8_t)(v >> 24);
}

static uint16_t get_u16(const uint8_t *p)
{
    return (uint16_t)(p[0] | (p[1] << 8));
}

static uint32_t get_u32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) |
           ((uint32_t)p[3] << 24);
}

/* binary32 with all exponent bits set is an infinity or a NaN */
static int bits_non_finite(uint32_t bits)
{
    return (bits & 0x7F800000u) == 0x7F800000u;
}

/* The rules that tie kind, encoding and count together (same order as the Python codec). */
static int check_shape(uint8_t kind, uint8_t encoding, uint8_t count)
{
    if (count > PR_MAX_CHANNELS) {
        return PR_ERR_CHANNELS;
    }
    if (kind == PR_KIND_HEARTBEAT && count != 0) {
        return PR_ERR_CHANNELS;
    }
    if (kind == PR_KIND_STATUS &&
        (encoding != PR_ENC_F32 || count < PR_STATUS_MIN_CHANNELS)) {
        return PR_ERR_CHANNELS;
    }
    return PR_OK;
}

int pr_encode(const pr_frame *f, uint8_t *out, size_t out_cap, size_t *out_len)
{
    uint8_t raw[PR_MAX_RAW];
    size_t n = PR_HEADER_SIZE;
    size_t enc_len;
    unsigned i;
    int r;

    if (f->kind < PR_KIND_SENSOR || f->kind > PR_KIND_STATUS) {
        return PR_ERR_KIND;
    }
    if (f->encoding != PR_ENC_F32 && f->encoding != PR_ENC_I16) {
        return PR_ERR_ENCODING;
    }
    r = check_shape(f->kind, f->encoding, f->count);
    if (r != PR_OK) {
        return r;
    }
    raw[0] = (uint8_t)PR_VERSION;
    raw[1] = f->kind;
    put_u16(raw + 2, f->seq);
    put_u32(raw + 4, f->tick);
    raw[8] = f->encoding;
    raw[9] = f->count;
    for (i = 0; i < f->count; ++i) {
        if (f->encoding == PR_ENC_F32) {
            uint32_t bits;
            memcpy(&bits, &f->v.f32[i], sizeof bits);
            if (bits_non_finite(bits)) {
                return PR_ERR_NON_FINITE;
            }
            put_u32(raw + n, bits);
            n += 4;
        } else {
            put_u16(raw + n, (uint16_t)f->v.i16[i]);
            n += 2;
        }
    }
    put_u16(raw + n, pr_crc16(PR_CRC_INIT, raw, n));
    n += PR_CRC_SIZE;
    enc_len = pr_cobs_encode(raw, n, out, out_cap);
    if (enc_len == 0 || enc_len >= out_cap) {
        return PR_ERR_BUFFER;
    }
    out[enc_len] = 0;
    *out_len = enc_len + 1;
    return PR_OK;
}

/* link_encoding: PR_ENC_F32 or PR_ENC_I16, or -1 for either (pr_decode) */
static int decode(const uint8_t *enc, size_t len, int link_encoding, pr_frame *f)
{
    uint8_t raw[PR_MAX_RAW];
    size_t n;
    size_t payload;
    size_t width;
    unsigned i;
    int r;

    if (len > 0 && enc[len - 1] == 0) {
        --len;
    }
    if (len == 0) {
        return PR_ERR_TRUNCATED;
    }
    if (len > PR_MAX_ENCODED) {
        return PR_ERR_OVERSIZE;
    }
    if (pr_cobs_decode(enc, len, raw, sizeof raw, &n) != PR_OK) {
        return PR_ERR_COBS; /* a packet of <= PR_MAX_ENCODED bytes always fits raw */
    }
    if (n < PR_HEADER_SIZE + PR_CRC_SIZE) {
        return PR_ERR_TRUNCATED;
    }
    if (pr_crc16(PR_CRC_INIT, raw, n - PR_CRC_SIZE) != get_u16(raw + n - PR_CRC_SIZE)) {
        return PR_ERR_CRC;
    }
    f->version = raw[0];
    f->kind = raw[1];
    f->seq = get_u16(raw + 2);
    f->tick = get_u32(raw + 4);
    f->encoding = raw[8];
    f->count = raw[9];
    if (f->version != PR_VERSION) {
        return PR_ERR_VERSION;
    }
    if (f->kind < PR_KIND_SENSOR || f->kind > PR_KIND_STATUS) {
        return PR_ERR_KIND;
    }
    if (f->encoding == PR_ENC_F32) {
        width = 4;
    } else if (f->encoding == PR_ENC_I16) {
        width = 2;
    } else {
        return PR_ERR_ENCODING;
    }
    if (f->count > PR_MAX_CHANNELS) {
        return PR_ERR_CHANNELS;
    }
    payload = n - PR_HEADER_SIZE - PR_CRC_SIZE;
    if (payload != f->count * width) {
        return payload < f->count * width ? PR_ERR_TRUNCATED : PR_ERR_LENGTH;
    }
    r = check_shape(f->kind, f->encoding, f->count);
    if (r != PR_OK) {
        return r;
    }
    if (link_encoding >= 0 && (int)f->encoding != link_encoding &&
        (f->kind == PR_KIND_SENSOR || f->kind == PR_KIND_COMMAND)) {
        return PR_ERR_ENCODING_MISMATCH;
    }
    for (i = 0; i < f->count; ++i) {
        const uint8_t *p = raw + PR_HEADER_SIZE + i * width;
        if (width == 4) {
            uint32_t bits = get_u32(p);
            if (bits_non_finite(bits)) {
                return PR_ERR_NON_FINITE;
            }
            memcpy(&f->v.f32[i], &bits, sizeof bits);
        } else {
            f->v.i16[i] = (int16_t)get_u16(p);
        }
    }
    return PR_OK;
}

int pr_decode(const uint8_t *enc, size_t len, pr_frame *f)
{
    return decode(enc, len, -1, f);
}

int pr_decode_link(const uint8_t *enc, size_t len, uint8_t link_encoding, pr_frame *f)
{
    return decode(enc, len, (int)link_encoding, f);
}

void pr_deframer_init(pr_deframer *d)
{
    memset(d, 0, sizeof *d);
}

int pr_deframer_push(pr_deframer *d, uint8_t byte, const uint8_t **frame, size_t *len)
{
    if (d->ready) {
        d->ready = 0;
        d->len = 0;
    }
    if (byte == 0) {
        if (d->skipping) {
            d->skipping = 0;
            return 0;
        }
        if (d->len == 0) {
            return 0; /* empty run: extra delimiters are allowed */
        }
        d->ready = 1;
        *frame = d->buf;
        *len = d->len;
        return 1;
    }
    if (d->skipping) {
        return 0;
    }
    if (d->len >= sizeof d->buf) {
        ++d->oversize;
        d->skipping = 1;
        d->len = 0;
        return 0;
    }
    d->buf[d->len++] = byte;
    return 0;
}

const char *pr_result_name(int result)
{
    static const char *const names[] = {"ok",      "cobs",     "crc",     "truncated",
                                        "length",  "oversize", "version", "kind",
                                        "encoding", "channels", "non_finite", "buffer",
                                        "encoding_mismatch"};
    if (result < 0 || result >= (int)(sizeof names / sizeof names[0])) {
        return "unknown";
    }
    return names[result];
}
