/*
 * A spinrig bench device built for the host computer: the C reference library (spinrig_wire.c)
 * driving a tiny synthetic airframe, speaking the protocol on standard input and output, or on a
 * pseudo-terminal it creates (--pty, the slave's path printed on standard error).
 *
 * It is the template a firmware author starts from. Everything above the line "hardware layer"
 * is what a real device keeps: the command loop, the bench-safety helper (sr_bench_*: arming with
 * a nonce, the heartbeat watchdog, the error-burst stop, the throttle ceiling), the streaming of
 * GYRO_BLOCK, MOTOR_STATE and DEVICE_STATUS. The hardware layer (the hal_* functions) is what an
 * author replaces: the clock, the serial port, the gyro and the motor outputs and telemetry.
 *
 *   bench_device [--pty] [--seconds N] [--motors N] [--ceiling PERCENT] [--boot-id N] [--no-telemetry]
 *
 * --no-telemetry: a board whose speed controllers send no telemetry (MOTOR_STATE flags 0).
 *
 * Standard error gets one line per bench event ("t_ms=... armed", "t_ms=... stopped: ..."), so a
 * test or a person can see what the device did. SIGTERM and SIGINT stop the motors and exit.
 */
#define _XOPEN_SOURCE 600
#define _POSIX_C_SOURCE 200809L

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <poll.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "../spinrig_wire.h"

#define GYRO_RATE_HZ 2000u
#define GYRO_BATCH 20u
#define MOTOR_STATE_HZ 100u
#define STATUS_HZ 5u
#define POLE_PAIRS 7u
#define HEARTBEAT_TIMEOUT_MS 500u
#define SENS_NUM 164u /* 16.4 counts per deg/s (+-2000 deg/s full scale) */
#define SENS_DEN 10u

/* ================================================================ hardware layer
 * Replace these with the board's own: a free-running clock, the serial port, the gyro FIFO, the
 * motor outputs (ESC protocol) and their telemetry. Floats are fine here on a host; the library
 * above uses none. */

static int hal_in = 0, hal_out = 1;
static double hal_t0;
static double hal_rpm[SR_MAX_MOTORS];   /* the synthetic motors' mechanical speed */
static double hal_phase[SR_MAX_MOTORS]; /* their shaft angle, turns */
static uint16_t hal_cmd[SR_MAX_MOTORS]; /* the throttle they are driven at, 0.01 % */
static double hal_mode[3][2];           /* the frame mode's state per axis (velocity, position) */
static uint32_t hal_noise = 12345u;

static double hal_clock_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

/* Microseconds since boot (wraps at 2^32, as the protocol's device time does). */
static uint32_t hal_now_us(void) { return (uint32_t)(uint64_t)((hal_clock_s() - hal_t0) * 1e6); }

/* Write a frame without ever blocking: when the host does not read (it closed, or it is slow) the
 * output is dropped, as a UART's full transmit buffer would drop it; the host's decoder counts the
 * damage and resynchronises at the next delimiter. A closed host is not an error here: the
 * heartbeat watchdog handles it. */
static int hal_tx_cut = 0; /* a frame was cut short: a 0x00 goes first to end it (SPEC 3.2) */

static void hal_write(const uint8_t *buf, size_t len)
{
    /* Never waits: when the host does not read and the output is full, the rest of the frame is
     * dropped, as an overflowing UART FIFO would drop it. A device that waited here would stop
     * hearing the host's commands and running its watchdog (every loop would take longer). */
    size_t sent = 0;
    if (hal_tx_cut) {
        static const uint8_t zero = 0;
        if (write(hal_out, &zero, 1) != 1) {
            return;
        }
        hal_tx_cut = 0;
    }
    while (sent < len) {
        ssize_t n = write(hal_out, buf + sent, len - sent);
        if (n < 0 && errno == EINTR) {
            continue;
        }
        if (n <= 0) {
            hal_tx_cut = sent > 0;
            return;
        }
        sent += (size_t)n;
    }
}

/* Bytes from the host, waiting at most timeout_ms; 0 when none, -1 when the input ended. */
static int hal_read(uint8_t *buf, size_t cap, int timeout_ms)
{
    struct pollfd p;
    ssize_t n;
    p.fd = hal_in;
    p.events = POLLIN;
    p.revents = 0;
    if (poll(&p, 1, timeout_ms) <= 0) {
        return 0;
    }
    n = read(hal_in, buf, cap);
    if (n < 0 && (errno == EINTR || errno == EAGAIN || errno == EIO)) {
        return 0; /* EIO: a pty whose other side is not open at the moment */
    }
    return n <= 0 ? -1 : (int)n;
}

/* Drive the motors (a real board sends these to its speed controllers). */
static void hal_motors_set(const uint16_t *throttle, uint8_t count)
{
    memcpy(hal_cmd, throttle, sizeof(uint16_t) * count);
}

static double hal_gauss(void)
{
    /* sum of 4 uniforms from a linear congruential generator: close enough to Gaussian here */
    double s = 0.0;
    int i;
    for (i = 0; i < 4; i++) {
        hal_noise = hal_noise * 1664525u + 1013904223u;
        s += (double)(hal_noise >> 8) / 16777216.0 - 0.5;
    }
    return s * 1.732;
}

/* Advance the synthetic airframe by one gyro period and return one sample (counts). Each motor
 * follows its throttle with a 0.15 s lag up to 24000 RPM; its imbalance (motor 2 twice the others)
 * shakes the frame at 1x and its 2-blade prop at blade-pass; the frame has one mode at 180 Hz
 * (damping ratio 3 %) on roll and pitch. */
static void hal_gyro_sample(uint8_t motors, int16_t out[3])
{
    const double dt = 1.0 / GYRO_RATE_HZ, fn = 180.0, zeta = 0.03;
    const double wn = 2.0 * 3.14159265358979 * fn;
    double force[3] = {0.0, 0.0, 0.0};
    uint8_t m;
    int a;
    for (m = 0; m < motors; m++) {
        double target = (double)hal_cmd[m] / (double)SR_THROTTLE_FULL * 24000.0;
        double k = (m == 1) ? 2.0 : 1.0, w, s1, s2;
        hal_rpm[m] += (target - hal_rpm[m]) * dt / 0.15;
        hal_phase[m] += hal_rpm[m] / 60.0 * dt;
        hal_phase[m] -= floor(hal_phase[m]);
        w = hal_rpm[m] / 10000.0;
        s1 = sin(2.0 * 3.14159265358979 * hal_phase[m]);
        s2 = sin(4.0 * 3.14159265358979 * hal_phase[m]);
        force[0] += k * w * w * 3.0e4 * s1 + w * w * 1.0e4 * s2;
        force[1] += k * w * w * 3.0e4 * cos(2.0 * 3.14159265358979 * hal_phase[m]);
        force[2] += 0.3 * k * w * w * 1.0e4 * s1;
    }
    for (a = 0; a < 3; a++) {
        /* the mode: x'' + 2 zeta wn x' + wn^2 x = f (semi-implicit Euler); the gyro reads x' */
        double *v = &hal_mode[a][0], *x = &hal_mode[a][1];
        double f = (a < 2 ? force[a] : 0.0) + 2.0e4 * hal_gauss();
        double rate;
        *v += (f - 2.0 * zeta * wn * *v - wn * wn * *x) * dt;
        *x += *v * dt;
        rate = *v + (a == 2 ? force[2] * 1e-3 : 0.0) + 0.5 * hal_gauss();
        rate = rate * (double)SENS_NUM / (double)SENS_DEN;
        if (rate > 32767.0) {
            rate = 32767.0;
        }
        if (rate < -32768.0) {
            rate = -32768.0;
        }
        out[a] = (int16_t)rate;
    }
}

/* Telemetry of motor m: electrical RPM, and whether it is live. */
static uint32_t hal_motor_erpm(uint8_t m) { return (uint32_t)(hal_rpm[m] * POLE_PAIRS); }

/* ================================================================ the device */

static volatile sig_atomic_t quit_signal = 0;
static void on_signal(int sig) { quit_signal = sig; }

static uint8_t tx_seq = 0;
static uint8_t frame[SR_MAX_WIRE];

static void send_frame(size_t n)
{
    if (n > 0) {
        hal_write(frame, n);
        tx_seq = (uint8_t)(tx_seq + 1u);
    }
}

static void say(uint32_t now_ms, const char *what)
{
    fprintf(stderr, "t_ms=%lu %s\n", (unsigned long)now_ms, what);
    fflush(stderr);
}

static int open_pty(int *hold)
{
    struct termios t;
    int master = posix_openpt(O_RDWR | O_NOCTTY);
    const char *name;
    if (master < 0 || grantpt(master) != 0 || unlockpt(master) != 0 || (name = ptsname(master)) == NULL) {
        return -1;
    }
    /* hold the slave open in raw mode: the line discipline never edits the bytes, and a host
     * that closes (or dies) does not hang the pty up */
    *hold = open(name, O_RDWR | O_NOCTTY);
    if (*hold < 0 || tcgetattr(*hold, &t) != 0) {
        return -1;
    }
    t.c_iflag &= ~(tcflag_t)(IGNBRK | BRKINT | PARMRK | ISTRIP | INLCR | IGNCR | ICRNL | IXON);
    t.c_oflag &= ~(tcflag_t)OPOST;
    t.c_lflag &= ~(tcflag_t)(ECHO | ECHONL | ICANON | ISIG | IEXTEN);
    t.c_cflag &= ~(tcflag_t)(CSIZE | PARENB);
    t.c_cflag |= (tcflag_t)CS8;
    if (tcsetattr(*hold, TCSANOW, &t) != 0) {
        return -1;
    }
    fprintf(stderr, "spinrig bench device on %s\n", name);
    fflush(stderr);
    return master;
}

int main(int argc, char **argv)
{
    sr_bench_t bench;
    sr_decoder_t dec;
    sr_device_info_t info;
    sr_command_t cmd;
    uint8_t rx[512];
    int16_t gyro[3 * GYRO_BATCH];
    uint32_t sample_seq = 0, block_t_us = 0, boot_id = 0x5eed0001u;
    uint64_t samples_done = 0, motor_done = 0, status_done = 0;
    uint16_t host_ok = 0, host_bad = 0, ceiling = 8000;
    uint8_t motors = 4, in_block = 0, streaming = 0, was_armed = 0;
    double seconds = 0.0;
    int use_pty = 0, hold = -1, telemetry = 1, i;
    struct sigaction sa;

    for (i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--pty") == 0) {
            use_pty = 1;
        } else if (strcmp(argv[i], "--seconds") == 0 && i + 1 < argc) {
            seconds = atof(argv[++i]);
        } else if (strcmp(argv[i], "--motors") == 0 && i + 1 < argc) {
            motors = (uint8_t)atoi(argv[++i]);
        } else if (strcmp(argv[i], "--ceiling") == 0 && i + 1 < argc) {
            ceiling = (uint16_t)(atof(argv[++i]) * 100.0);
        } else if (strcmp(argv[i], "--no-telemetry") == 0) {
            telemetry = 0;
        } else if (strcmp(argv[i], "--boot-id") == 0 && i + 1 < argc) {
            boot_id = (uint32_t)strtoul(argv[++i], NULL, 0);
        } else {
            fprintf(stderr, "usage: %s [--pty] [--seconds N] [--motors N] [--ceiling PERCENT] [--boot-id N] "
                    "[--no-telemetry]\n", argv[0]);
            return 2;
        }
    }
    if (motors > SR_MAX_MOTORS || ceiling > SR_THROTTLE_FULL) {
        fprintf(stderr, "--motors at most %u, --ceiling at most 100\n", SR_MAX_MOTORS);
        return 2;
    }
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = on_signal;
    sigaction(SIGTERM, &sa, NULL);
    sigaction(SIGINT, &sa, NULL);
    signal(SIGPIPE, SIG_IGN);
    if (use_pty) {
        hal_in = hal_out = open_pty(&hold);
        if (hal_in < 0) {
            perror("pty");
            return 1;
        }
    }
    (void)fcntl(hal_out, F_SETFL, fcntl(hal_out, F_GETFL) | O_NONBLOCK);
    hal_t0 = hal_clock_s();

    memset(&info, 0, sizeof info);
    info.axis_convention = 1;
    info.boot_id = boot_id;
    info.gyro_rate_mhz = GYRO_RATE_HZ * 1000u;
    info.sens_num = SENS_NUM;
    info.sens_den = SENS_DEN;
    info.full_scale_dps = 2000;
    info.motor_count = motors;
    info.pole_pairs = POLE_PAIRS;
    info.heartbeat_timeout_ms = HEARTBEAT_TIMEOUT_MS;
    info.max_batch = GYRO_BATCH;
    info.throttle_ceiling = ceiling;
    info.motor_state_rate_hz = MOTOR_STATE_HZ;
    info.board_id_len = 12;
    memcpy(info.board_id, "bench-device", 12);

    sr_bench_init(&bench, HEARTBEAT_TIMEOUT_MS, ceiling, motors);
    sr_decoder_init(&dec);
    send_frame(sr_encode_device_info(&info, tx_seq, frame, sizeof frame)); /* SPEC 2: at boot */
    say(0, "booted, disarmed");

    while (!quit_signal) {
        uint32_t now_us = hal_now_us(), now_ms = now_us / 1000u;
        double t = hal_clock_s() - hal_t0;
        int n = hal_read(rx, sizeof rx, 1), k;
        if (n < 0) {
            say(now_ms, "input ended");
            break;
        }
        for (k = 0; k < n; k++) {
            sr_rx_t r = sr_decoder_push(&dec, rx[k], &cmd);
            if (r == SR_RX_COMMAND) {
                sr_verdict_t v = sr_bench_command(&bench, &cmd, now_ms);
                host_ok++;
                if (cmd.type == SR_REQUEST_INFO) {
                    send_frame(sr_encode_command_outcome(cmd.type, cmd.seq, v.result, v.detail, tx_seq, frame,
                                                         sizeof frame));
                    send_frame(sr_encode_device_info(&info, tx_seq, frame, sizeof frame));
                    continue;
                }
                if (cmd.type == SR_STREAM_CONTROL) {
                    streaming = cmd.u.enable;
                }
                if (cmd.type == SR_SIM_TAP) {
                    v.result = SR_OUTCOME_UNSUPPORTED; /* a real frame is tapped by hand */
                }
                if (cmd.type == SR_ARM_BENCH && v.result == SR_OUTCOME_OK) {
                    say(now_ms, "armed");
                }
                if (cmd.type == SR_STOP_MOTORS) {
                    say(now_ms, "stopped: STOP_MOTORS");
                }
                if (cmd.type != SR_HOST_HEARTBEAT || v.result != SR_OUTCOME_OK) {
                    send_frame(sr_encode_command_outcome(cmd.type, cmd.seq, v.result, v.detail, tx_seq, frame,
                                                         sizeof frame));
                }
            } else if (r == SR_RX_CRC_ERROR || r == SR_RX_MALFORMED || r == SR_RX_OVERSIZE) {
                host_bad++;
                if (sr_bench_bad_frame(&bench, now_ms)) {
                    say(now_ms, "stopped: a burst of bad host frames");
                }
                if (r == SR_RX_MALFORMED) {
                    send_frame(sr_encode_command_outcome(0, 0, SR_OUTCOME_MALFORMED, 0, tx_seq, frame,
                                                         sizeof frame));
                }
            } else if (r == SR_RX_UNKNOWN) {
                send_frame(sr_encode_command_outcome(0, 0, SR_OUTCOME_UNSUPPORTED, 0, tx_seq, frame, sizeof frame));
            }
        }
        if (sr_bench_tick(&bench, now_ms)) {
            say(now_ms, "stopped: heartbeat lost");
        }
        if (was_armed && !bench.armed) {
            was_armed = 0;
        } else if (bench.armed) {
            was_armed = 1;
        }
        hal_motors_set(bench.throttle, motors); /* always what the safety helper allows, nothing else */

        /* the gyro: every sample period that has passed, in batches of GYRO_BATCH */
        while ((double)samples_done < t * GYRO_RATE_HZ) {
            if (in_block == 0) {
                block_t_us = (uint32_t)(uint64_t)((double)samples_done * 1e6 / GYRO_RATE_HZ);
            }
            hal_gyro_sample(motors, &gyro[3 * in_block]);
            samples_done++;
            in_block++;
            if (in_block == GYRO_BATCH) {
                if (streaming) {
                    send_frame(sr_encode_gyro_block(sample_seq, block_t_us, gyro, GYRO_BATCH, tx_seq, frame,
                                                    sizeof frame));
                }
                sample_seq += GYRO_BATCH;
                in_block = 0;
            }
        }
        while ((double)motor_done < t * MOTOR_STATE_HZ) {
            sr_motor_state_t ms;
            uint8_t m;
            ms.t_us = (uint32_t)(uint64_t)((double)motor_done * 1e6 / MOTOR_STATE_HZ);
            ms.count = motors;
            for (m = 0; m < motors; m++) {
                ms.motors[m].erpm = hal_motor_erpm(m);
                ms.motors[m].throttle = bench.throttle[m];
                ms.motors[m].flags = (uint8_t)telemetry;
            }
            motor_done++;
            if (streaming) {
                send_frame(sr_encode_motor_state(&ms, tx_seq, frame, sizeof frame));
            }
        }
        while ((double)status_done < t * STATUS_HZ) {
            sr_device_status_t st;
            memset(&st, 0, sizeof st);
            st.t_us = now_us;
            st.boot_id = boot_id;
            st.bench_state = sr_bench_state(&bench);
            st.faults = bench.faults;
            st.host_frames_ok = host_ok;
            st.host_frames_bad = host_bad;
            st.streaming = streaming;
            status_done++;
            send_frame(sr_encode_device_status(&st, tx_seq, frame, sizeof frame));
        }
        if (seconds > 0.0 && t >= seconds) {
            break;
        }
    }
    sr_bench_stop(&bench, SR_FAULT_STOP_COMMAND);
    hal_motors_set(bench.throttle, motors);
    say(hal_now_us() / 1000u, quit_signal ? "exit on a signal, motors stopped" : "exit, motors stopped");
    if (hold >= 0) {
        close(hold);
    }
    return 0;
}
