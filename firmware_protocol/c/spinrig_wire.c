/* spinrig wire protocol v1: C reference. See spinrig_wire.h and SPEC.md. */
#include "spinrig_wire.h"

/* ---------------------------------------------------------------- little-endian helpers */

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
    return (uint16_t)(p[0] | ((uint16_t)p[1] << 8));
}

static uint32_t get_u32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
}

/* ---------------------------------------------------------------- CRC and COBS */

uint16_t sr_crc16(const uint8_t *data, size_t len, uint16_t crc)
{
    size_t i;
    for (i = 0; i < len; i++) {
        int bit;
        crc = (uint16_t)(crc ^ ((uint16_t)data[i] << 8));
        for (bit = 0; bit < 8; bit++) {
            if (crc & 0x8000u) {
                crc = (uint16_t)(((uint32_t)crc << 1) ^ 0x1021u);
            } else {
                crc = (uint16_t)((uint32_t)crc << 1);
            }
        }
    }
    return crc;
}

size_t sr_cobs_encode(const uint8_t *in, size_t len, uint8_t *out)
{
    size_t code_at = 0, o = 1, i;
    uint8_t code = 1;
    for (i = 0; i < len; i++) {
        if (in[i] == 0) {
            out[code_at] = code;
            code_at = o++;
            code = 1;
            continue;
        }
        out[o++] = in[i];
        code++;
        if (code == 0xFFu && i + 1 < len) { /* canonical: no empty block after a final full one */
            out[code_at] = code;
            code_at = o++;
            code = 1;
        }
    }
    out[code_at] = code;
    return o;
}

int sr_cobs_decode(const uint8_t *in, size_t len, uint8_t *out, size_t out_cap)
{
    size_t i = 0, o = 0;
    while (i < len) {
        uint8_t code = in[i];
        size_t end, k;
        if (code == 0) {
            return -1;
        }
        end = i + code;
        if (end > len) {
            return -1;
        }
        for (k = i + 1; k < end; k++) {
            if (in[k] == 0 || o >= out_cap) {
                return -1;
            }
            out[o++] = in[k];
        }
        i = end;
        if (code < 0xFFu && i < len) {
            if (o >= out_cap) {
                return -1;
            }
            out[o++] = 0;
        }
    }
    return (int)o;
}

size_t sr_frame_encode(uint8_t type, uint8_t seq, const uint8_t *payload, size_t len, uint8_t *out,
                       size_t cap)
{
    uint8_t body[SR_MAX_BODY];
    uint16_t crc;
    size_t n, i;
    if (len > SR_MAX_PAYLOAD || cap < len + 6u) {
        return 0;
    }
    body[0] = type;
    body[1] = seq;
    for (i = 0; i < len; i++) {
        body[2 + i] = payload[i];
    }
    crc = sr_crc16(body, len + 2u, 0xFFFFu);
    body[len + 2u] = (uint8_t)(crc >> 8); /* CRC is the one big-endian field (SPEC 3.3) */
    body[len + 3u] = (uint8_t)(crc & 0xFFu);
    n = sr_cobs_encode(body, len + 4u, out);
    out[n++] = 0x00;
    return n;
}

/* ---------------------------------------------------------------- device to host encoders */

size_t sr_encode_device_info(const sr_device_info_t *m, uint8_t seq, uint8_t *out, size_t cap)
{
    uint8_t p[37 + SR_MAX_BOARD_ID];
    size_t i;
    if (m->board_id_len > SR_MAX_BOARD_ID || m->motor_count > SR_MAX_MOTORS || m->max_batch == 0 ||
        m->max_batch > SR_MAX_GYRO_BATCH || m->sens_num == 0 || m->sens_den == 0 ||
        m->throttle_ceiling > SR_THROTTLE_FULL) {
        return 0;
    }
    p[0] = SR_PROTOCOL_VERSION;
    p[1] = m->axis_convention;
    put_u32(p + 2, m->boot_id);
    put_u32(p + 6, m->gyro_rate_mhz);
    put_u32(p + 10, m->sens_num);
    put_u32(p + 14, m->sens_den);
    put_u16(p + 18, m->full_scale_dps);
    p[20] = m->filter_flags;
    put_u16(p + 21, m->onboard_cutoff_hz);
    put_u16(p + 23, m->onboard_notch_centre_hz);
    put_u16(p + 25, m->antialias_hz);
    p[27] = m->motor_count;
    p[28] = m->pole_pairs;
    put_u16(p + 29, m->heartbeat_timeout_ms);
    p[31] = m->max_batch;
    put_u16(p + 32, m->throttle_ceiling);
    put_u16(p + 34, m->motor_state_rate_hz);
    p[36] = m->board_id_len;
    for (i = 0; i < m->board_id_len; i++) {
        p[37 + i] = (uint8_t)m->board_id[i];
    }
    return sr_frame_encode(SR_DEVICE_INFO, seq, p, 37u + m->board_id_len, out, cap);
}

size_t sr_encode_gyro_block(uint32_t sample_seq, uint32_t t_us, const int16_t *xyz, uint8_t count,
                            uint8_t seq, uint8_t *out, size_t cap)
{
    uint8_t p[9 + 6 * SR_MAX_GYRO_BATCH];
    size_t i;
    if (count == 0 || count > SR_MAX_GYRO_BATCH) {
        return 0;
    }
    put_u32(p, sample_seq);
    put_u32(p + 4, t_us);
    p[8] = count;
    for (i = 0; i < 3u * count; i++) {
        put_u16(p + 9 + 2 * i, (uint16_t)xyz[i]);
    }
    return sr_frame_encode(SR_GYRO_BLOCK, seq, p, 9u + 6u * count, out, cap);
}

size_t sr_encode_motor_state(const sr_motor_state_t *m, uint8_t seq, uint8_t *out, size_t cap)
{
    uint8_t p[5 + 7 * SR_MAX_MOTORS];
    size_t i;
    if (m->count > SR_MAX_MOTORS) {
        return 0;
    }
    put_u32(p, m->t_us);
    p[4] = m->count;
    for (i = 0; i < m->count; i++) {
        uint8_t *e = p + 5 + 7 * i;
        put_u32(e, m->motors[i].erpm);
        put_u16(e + 4, m->motors[i].throttle);
        e[6] = m->motors[i].flags;
    }
    return sr_frame_encode(SR_MOTOR_STATE, seq, p, 5u + 7u * m->count, out, cap);
}

size_t sr_encode_device_status(const sr_device_status_t *m, uint8_t seq, uint8_t *out, size_t cap)
{
    uint8_t p[20];
    put_u32(p, m->t_us);
    put_u32(p + 4, m->boot_id);
    p[8] = m->bench_state;
    put_u16(p + 9, m->faults);
    put_u16(p + 11, m->supply_mv);
    put_u16(p + 13, m->current_10ma);
    put_u16(p + 15, m->host_frames_ok);
    put_u16(p + 17, m->host_frames_bad);
    p[19] = m->streaming;
    return sr_frame_encode(SR_DEVICE_STATUS, seq, p, sizeof p, out, cap);
}

size_t sr_encode_log_text(uint8_t level, const char *text, size_t len, uint8_t seq, uint8_t *out,
                          size_t cap)
{
    uint8_t p[1 + SR_MAX_LOG_TEXT];
    size_t i;
    if (len > SR_MAX_LOG_TEXT) {
        return 0;
    }
    p[0] = level;
    for (i = 0; i < len; i++) {
        p[1 + i] = (uint8_t)text[i];
    }
    return sr_frame_encode(SR_LOG_TEXT, seq, p, 1u + len, out, cap);
}

size_t sr_encode_command_outcome(uint8_t command_type, uint8_t command_seq, uint8_t result,
                             uint32_t detail, uint8_t seq, uint8_t *out, size_t cap)
{
    uint8_t p[7];
    p[0] = command_type;
    p[1] = command_seq;
    p[2] = result;
    put_u32(p + 3, detail);
    return sr_frame_encode(SR_COMMAND_OUTCOME, seq, p, sizeof p, out, cap);
}

/* ---------------------------------------------------------------- host command decoder */

static sr_rx_t parse_command(const uint8_t *body, size_t n, sr_command_t *out)
{
    const uint8_t *p = body + 2;
    size_t plen = n - 4u;
    size_t i;
    out->type = body[0];
    out->seq = body[1];
    switch (body[0]) {
    case SR_REQUEST_INFO:
        return SR_RX_COMMAND;
    case SR_STREAM_CONTROL:
        if (plen < 1 || p[0] > 1) {
            return SR_RX_MALFORMED;
        }
        out->u.enable = p[0];
        return SR_RX_COMMAND;
    case SR_ARM_BENCH:
    case SR_HOST_HEARTBEAT:
        if (plen < 4) {
            return SR_RX_MALFORMED;
        }
        out->u.nonce = get_u32(p);
        if (body[0] == SR_ARM_BENCH && out->u.nonce == 0) {
            return SR_RX_MALFORMED;
        }
        return SR_RX_COMMAND;
    case SR_SET_THROTTLE:
        if (plen < 5) {
            return SR_RX_MALFORMED;
        }
        out->u.throttle.nonce = get_u32(p);
        out->u.throttle.count = p[4];
        if (p[4] == 0 || p[4] > SR_MAX_MOTORS || plen != 5u + 2u * p[4]) {
            return SR_RX_MALFORMED;
        }
        for (i = 0; i < p[4]; i++) {
            uint16_t t = get_u16(p + 5 + 2 * i);
            if (t > SR_THROTTLE_FULL) {
                return SR_RX_MALFORMED;
            }
            out->u.throttle.throttle[i] = t;
        }
        return SR_RX_COMMAND;
    case SR_STOP_MOTORS:
        out->u.reason = plen >= 1 ? p[0] : 0;
        return SR_RX_COMMAND;
    case SR_SIM_TAP:
        if (plen < 3) {
            return SR_RX_MALFORMED;
        }
        out->u.tap.target = p[0];
        out->u.tap.strength = get_u16(p + 1);
        return SR_RX_COMMAND;
    default:
        return SR_RX_UNKNOWN;
    }
}

sr_rx_t sr_decode_frame(const uint8_t *enc, size_t len, sr_command_t *out)
{
    uint8_t body[SR_MAX_BODY];
    int n;
    if (len == 0) {
        return SR_RX_IDLE;
    }
    if (len > SR_MAX_ENCODED) {
        return SR_RX_OVERSIZE;
    }
    n = sr_cobs_decode(enc, len, body, sizeof body);
    if (n < 0 || (size_t)n < SR_MIN_BODY) {
        return SR_RX_MALFORMED;
    }
    if (sr_crc16(body, (size_t)n, 0xFFFFu) != 0) { /* residue of a valid body is 0 */
        return SR_RX_CRC_ERROR;
    }
    return parse_command(body, (size_t)n, out);
}

void sr_decoder_init(sr_decoder_t *d)
{
    d->len = 0;
    d->discarding = 0;
    d->frames_ok = d->crc_errors = d->malformed = d->oversize = d->unknown = 0;
}

sr_rx_t sr_decoder_push(sr_decoder_t *d, uint8_t byte, sr_command_t *out)
{
    sr_rx_t r;
    if (byte != 0x00) {
        if (d->discarding) {
            return SR_RX_NONE;
        }
        if (d->len >= SR_MAX_ENCODED) {
            d->discarding = 1; /* drop the rest of this frame, hunt for the next delimiter */
            d->oversize++;
            return SR_RX_OVERSIZE;
        }
        d->buf[d->len++] = byte;
        return SR_RX_NONE;
    }
    if (d->discarding) {
        d->discarding = 0;
        d->len = 0;
        return SR_RX_NONE; /* already reported as SR_RX_OVERSIZE */
    }
    r = sr_decode_frame(d->buf, d->len, out);
    d->len = 0;
    switch (r) {
    case SR_RX_COMMAND: d->frames_ok++; break;
    case SR_RX_CRC_ERROR: d->crc_errors++; break;
    case SR_RX_MALFORMED: d->malformed++; break;
    case SR_RX_OVERSIZE: d->oversize++; break;
    case SR_RX_UNKNOWN: d->unknown++; break;
    default: break;
    }
    return r;
}

/* ---------------------------------------------------------------- bench safety */

static void zero_throttle(sr_bench_t *b)
{
    size_t i;
    for (i = 0; i < SR_MAX_MOTORS; i++) {
        b->throttle[i] = 0;
    }
}

void sr_bench_init(sr_bench_t *b, uint16_t heartbeat_timeout_ms, uint16_t throttle_ceiling,
                   uint8_t motor_count)
{
    b->heartbeat_timeout_ms = heartbeat_timeout_ms;
    b->throttle_ceiling = throttle_ceiling > SR_THROTTLE_FULL ? SR_THROTTLE_FULL : throttle_ceiling;
    b->motor_count = motor_count > SR_MAX_MOTORS ? SR_MAX_MOTORS : motor_count;
    b->armed = 0;
    b->nonce = 0;
    b->last_heartbeat_ms = 0;
    b->faults = SR_FAULT_REBOOTED;
    b->bad_head = 0;
    b->bad_count = 0;
    zero_throttle(b);
}

void sr_bench_stop(sr_bench_t *b, uint16_t fault_bits)
{
    zero_throttle(b);
    b->armed = 0;
    b->nonce = 0;
    b->faults = (uint16_t)(b->faults | fault_bits);
}

uint8_t sr_bench_state(const sr_bench_t *b)
{
    size_t i;
    if (!b->armed) {
        return SR_BENCH_DISARMED;
    }
    for (i = 0; i < b->motor_count; i++) {
        if (b->throttle[i] != 0) {
            return SR_BENCH_SPINNING;
        }
    }
    return SR_BENCH_ARMED;
}

sr_verdict_t sr_bench_command(sr_bench_t *b, const sr_command_t *cmd, uint32_t now_ms)
{
    sr_verdict_t v;
    size_t i;
    v.result = SR_OUTCOME_OK;
    v.detail = 0;
    switch (cmd->type) {
    case SR_ARM_BENCH:
        if (b->throttle_ceiling == 0 || b->motor_count == 0) {
            /* motors reported (or none) but not driven by this device: nothing can be armed */
            v.result = SR_OUTCOME_UNSUPPORTED;
            return v;
        }
        if (b->faults & SR_FAULTS_BLOCKING_ARM) {
            v.result = SR_OUTCOME_REFUSED_FAULT;
            v.detail = b->faults;
            return v;
        }
        if (b->armed && b->nonce != cmd->u.nonce) {
            zero_throttle(b); /* a new session never inherits spinning motors */
        }
        b->armed = 1;
        b->nonce = cmd->u.nonce;
        b->faults = 0;
        b->last_heartbeat_ms = now_ms;
        v.detail = cmd->u.nonce;
        return v;
    case SR_SET_THROTTLE:
        if (!b->armed) {
            v.result = SR_OUTCOME_NOT_ARMED;
            return v;
        }
        if (cmd->u.throttle.nonce != b->nonce) {
            v.result = SR_OUTCOME_BAD_NONCE;
            return v;
        }
        if (cmd->u.throttle.count != b->motor_count) {
            v.result = SR_OUTCOME_BAD_MOTOR_COUNT;
            v.detail = b->motor_count;
            return v;
        }
        for (i = 0; i < cmd->u.throttle.count; i++) {
            uint16_t t = cmd->u.throttle.throttle[i];
            if (t > b->throttle_ceiling) {
                t = b->throttle_ceiling;
                v.result = SR_OUTCOME_LIMITED;
                v.detail = b->throttle_ceiling;
            }
            b->throttle[i] = t;
        }
        if (v.result == SR_OUTCOME_LIMITED) {
            b->faults = (uint16_t)(b->faults | SR_FAULT_THROTTLE_CAPPED);
        }
        b->last_heartbeat_ms = now_ms;
        return v;
    case SR_STOP_MOTORS:
        sr_bench_stop(b, SR_FAULT_STOP_COMMAND);
        return v;
    case SR_HOST_HEARTBEAT:
        if (b->armed) {
            if (cmd->u.nonce != b->nonce) {
                v.result = SR_OUTCOME_BAD_NONCE;
                return v;
            }
            b->last_heartbeat_ms = now_ms;
        }
        return v;
    case SR_REQUEST_INFO:
    case SR_STREAM_CONTROL:
        return v;
    default:
        v.result = SR_OUTCOME_UNSUPPORTED;
        return v;
    }
}

int sr_bench_bad_frame(sr_bench_t *b, uint32_t now_ms)
{
    uint8_t oldest;
    b->bad_times_ms[b->bad_head] = now_ms;
    b->bad_head = (uint8_t)((b->bad_head + 1u) % SR_ERROR_BURST_FRAMES);
    if (b->bad_count < SR_ERROR_BURST_FRAMES) {
        b->bad_count++;
    }
    if (b->bad_count < SR_ERROR_BURST_FRAMES) {
        return 0;
    }
    oldest = b->bad_head; /* after a full ring, the head is the oldest entry */
    if ((uint32_t)(now_ms - b->bad_times_ms[oldest]) < SR_ERROR_BURST_WINDOW_MS && b->armed) {
        sr_bench_stop(b, SR_FAULT_PROTOCOL_ERRORS);
        return 1;
    }
    return 0;
}

int sr_bench_tick(sr_bench_t *b, uint32_t now_ms)
{
    if (b->armed && (uint32_t)(now_ms - b->last_heartbeat_ms) >= b->heartbeat_timeout_ms) {
        sr_bench_stop(b, SR_FAULT_HEARTBEAT_LOST);
        return 1;
    }
    return 0;
}
