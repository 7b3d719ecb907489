/*
 * An emulated librtlsdr for tests: every function pyrtlsdr 0.5.1 binds at import, with
 * librtlsdr's signatures and return conventions (0 on success, negative on failure), and one
 * emulated RTL2832U + R820T dongle (serial "SPF00001") that streams synthetic 8-bit IQ in real
 * time and fails on cue.
 *
 * Build: cc -O2 -shared -fPIC -pthread -o librtlsdr.so fake_librtlsdr.c
 * (tests/rtlsdr_emulator.py does this once per test session). No SONAME on purpose: once the
 * test that loaded it by path is done, a bare dlopen("librtlsdr.so") does not find it again.
 *
 * Samples: uint8 I, Q = 127.5 + noise + tone, rounded and clipped to 0..255. The noise is
 * Irwin-Hall (sum of four 16-bit uniforms, variance 4/12 before scaling) from a xorshift64*
 * generator, scaled to `noise_rms` counts per component; the tone is a complex exponential of
 * `tone_amp` counts at the sky frequency `tone_hz`, i.e. at baseband (tone_hz - center_freq),
 * present only when that lies within +-fs/2. `counter=1` (or rtlsdr_set_testmode(dev, 1), as
 * the RTL2832's test mode) replaces the samples by an 8-bit counter of the stream's bytes.
 * Each transfer is filled in slices of about 5 ms, each generated when its time has come with
 * the centre frequency then in effect: a transfer that spans a retune holds old-LO samples
 * followed by new-LO samples, as a real transfer in flight does.
 *
 * Pacing: the stream advances by (bytes / 2) / fs on CLOCK_MONOTONIC (clock_nanosleep to an
 * absolute deadline), fs being the rate librtlsdr would really set (28.8 MHz * 2^22 / ratio,
 * with the ratio's two low bits cleared, as librtlsdr computes it).
 *
 * Faults, from the control file named by $FAKERTL_CONTROL (lines "key=value"; looked at with
 * stat() at every API call and every ~5 ms slice of a transfer, and parsed again when its
 * inode, size or mtime changed or it was written in the last second or two):
 *   present=0|1      0: unplugged: get_device_count 0, open -1, a running read_async returns
 *                    `unplug_rc` within one slice, calls on a handle opened before the unplug
 *                    fail (-1) even after a replug (the handle is to a device that went away)
 *   short=N          every Nth transfer is delivered short (half length); 0: never
 *   retune_fail=0|1  rtlsdr_set_center_freq returns -1 and leaves the tuner where it was
 *   unplug_rc=N      what read_async / read_sync return on unplug (default -5,
 *                    LIBUSB_ERROR_NOT_FOUND; real librtlsdr often just returns 0 from
 *                    read_async after cancelling itself on LIBUSB_TRANSFER_NO_DEVICE)
 *   tone_hz=F        sky frequency of the tone, Hz (default 1420.0e6)
 *   tone_amp=A       tone amplitude, counts (default 1.5)
 *   noise_rms=S      noise per component, counts (default 3.0)
 *   counter=0|1      stream an 8-bit byte counter instead of noise and tone
 *   stall=0|1        1: a wedged dongle: read_async keeps running but delivers nothing
 *                    (read_sync waits); cancel and unplug still end it
 * A missing file (or no $FAKERTL_CONTROL) means the defaults: present, no faults.
 *
 * Where librtlsdr's behaviour is copied (from memory of librtlsdr 0.6, librtlsdr.c): open of an
 * absent device -1; a second open of a device already open -6 (libusb_claim_interface:
 * LIBUSB_ERROR_BUSY); set_sample_rate -22 (-EINVAL) outside 225001-300000 / 900001-3200000;
 * set_freq_correction -2 when the value is unchanged; read_async -2 when already running;
 * cancel_async -2 when not running; read_async's buf_len used only when a non-zero multiple
 * of 512, else 16 * 32 * 512; rtlsdr_close waits for a running read_async to end. Here that
 * wait cancels the stream first (a real close would block forever) and is counted as
 * `close_while_streaming`, so tests can assert that it never happens. Closed handles are
 * kept (never freed) and any later use is counted as `stale_calls` and fails with -1 instead
 * of touching freed memory.
 *
 * Test hooks: long long fakertl_stat(const char *name); int fakertl_tunes(uint32_t *out,
 * int max); void fakertl_reset(void).
 */

#define _GNU_SOURCE
#include <errno.h>
#include <math.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

#define API __attribute__((visibility("default")))

typedef void (*rtlsdr_read_async_cb_t)(unsigned char *buf, uint32_t len, void *ctx);

#define MAGIC_LIVE 0x52544c31u   /* "RTL1" */
#define MAGIC_DEAD 0xdeadd00du
#define DEFAULT_BUF_LEN (16 * 32 * 512)
#define MAX_HANDLES 1024
#define MAX_TUNES 8192
#define SLICE_S 0.005
#define XTAL_HZ 28800000u

enum { INACTIVE = 0, RUNNING = 1, CANCELING = 2 };

static const char SERIAL[] = "SPF00001";
static const char MANUFACT[] = "Realtek";
static const char PRODUCT[] = "RTL2838UHIDIR";
static const char DEVNAME[] = "Generic RTL2832U OEM";

/* R820T gains, tenths of dB (librtlsdr tuner_r82xx.c r82xx_gains, from memory) */
static const int R820T_GAINS[] = {0,   9,   14,  27,  37,  77,  87,  125, 144, 157,
                                  166, 197, 207, 229, 254, 280, 297, 328, 338, 364,
                                  372, 386, 402, 421, 434, 439, 445, 480, 496};
#define N_GAINS ((int)(sizeof(R820T_GAINS) / sizeof(R820T_GAINS[0])))

/* ---------------------------------------------------------------- control file */
struct control {
    int present, short_every, retune_fail, unplug_rc, counter, stall;
    double tone_hz, tone_amp, noise_rms;
};

static pthread_mutex_t g_lock = PTHREAD_MUTEX_INITIALIZER;
static struct control g_ctl = {1, 0, 0, -5, 0, 0, 1420.0e6, 1.5, 3.0};
static char g_ctl_path[4096];
static struct stat g_ctl_seen;        /* identity of the file last parsed */
static int g_ctl_had_file;
static unsigned g_generation = 1;     /* bumped at each unplug */

/* counters (under g_lock) */
static long long st_opens, st_open_fails, st_closes, st_transfers, st_short, st_bytes,
    st_retunes, st_retune_fail, st_stale, st_close_streaming, st_control_reads,
    st_async_running, st_cancels;
static uint32_t g_tunes[MAX_TUNES];
static long long g_ntunes;

struct rtlsdr_dev {
    uint32_t magic;
    unsigned generation;
    uint32_t index;
    uint32_t rate;          /* as librtlsdr reports it */
    double rate_real;       /* what the ADC really runs at */
    uint32_t freq;          /* centre frequency, Hz (atomic: read by the streaming thread) */
    int corr_ppm, gain, manual_gain, agc, direct, dither, testmode, bias_tee;
    uint32_t bw, xtal_rtl, xtal_tuner;
    int gpio_dir, gpio_val;
    int async_status;       /* atomic */
    /* stream state: only the streaming thread touches these */
    uint64_t rng;
    double tone_re, tone_im;
    uint64_t stream_bytes;
    long long xfers;
};
typedef struct rtlsdr_dev rtlsdr_dev_t;

static rtlsdr_dev_t *g_handles[MAX_HANDLES];
static int g_nhandles;

static void ctl_defaults(struct control *c) {
    c->present = 1; c->short_every = 0; c->retune_fail = 0; c->unplug_rc = -5; c->counter = 0;
    c->stall = 0;
    c->tone_hz = 1420.0e6; c->tone_amp = 1.5; c->noise_rms = 3.0;
}

static void ctl_parse(FILE *f, struct control *c) {
    char line[512];
    while (fgets(line, sizeof line, f)) {
        char *eq = strchr(line, '=');
        if (!eq || line[0] == '#') continue;
        *eq = '\0';
        char *key = line, *val = eq + 1;
        while (*key == ' ' || *key == '\t') key++;
        char *end = key + strlen(key);
        while (end > key && (end[-1] == ' ' || end[-1] == '\t')) *--end = '\0';
        if (!strcmp(key, "present")) c->present = atoi(val) != 0;
        else if (!strcmp(key, "short")) c->short_every = atoi(val) > 0 ? atoi(val) : 0;
        else if (!strcmp(key, "retune_fail")) c->retune_fail = atoi(val) != 0;
        else if (!strcmp(key, "unplug_rc")) c->unplug_rc = atoi(val);
        else if (!strcmp(key, "counter")) c->counter = atoi(val) != 0;
        else if (!strcmp(key, "stall")) c->stall = atoi(val) != 0;
        else if (!strcmp(key, "tone_hz")) c->tone_hz = strtod(val, NULL);
        else if (!strcmp(key, "tone_amp")) c->tone_amp = strtod(val, NULL);
        else if (!strcmp(key, "noise_rms")) c->noise_rms = strtod(val, NULL);
    }
}

/* Re-read the control file if it changed; from_api: also pick up $FAKERTL_CONTROL (only on
 * the caller's thread, never on the streaming thread, so getenv never races a setenv there).
 * Returns a copy of the control state. */
static struct control ctl_poll(int from_api) {
    struct control out;
    pthread_mutex_lock(&g_lock);
    if (from_api) {
        const char *p = getenv("FAKERTL_CONTROL");
        if (!p) p = "";
        if (strncmp(p, g_ctl_path, sizeof g_ctl_path)) {
            snprintf(g_ctl_path, sizeof g_ctl_path, "%s", p);
            g_ctl_had_file = -1;   /* force a re-read */
        }
    }
    struct stat sb;
    int have = g_ctl_path[0] && stat(g_ctl_path, &sb) == 0;
    /* File times tick coarsely (a kernel tick) and inode numbers are reused, so two quick
     * rewrites of one size can look alike: a file changed within the last second is parsed
     * again at every look, an older one only when its identity changes. */
    struct timespec wall;
    clock_gettime(CLOCK_REALTIME, &wall);
    int recent = have && (wall.tv_sec - sb.st_mtim.tv_sec) < 2;
    int changed = have != g_ctl_had_file || recent ||
                  (have && (sb.st_ino != g_ctl_seen.st_ino || sb.st_size != g_ctl_seen.st_size ||
                            sb.st_mtim.tv_sec != g_ctl_seen.st_mtim.tv_sec ||
                            sb.st_mtim.tv_nsec != g_ctl_seen.st_mtim.tv_nsec));
    if (changed) {
        struct control c;
        ctl_defaults(&c);
        if (have) {
            FILE *f = fopen(g_ctl_path, "r");
            if (f) { ctl_parse(f, &c); fclose(f); }
            g_ctl_seen = sb;
        }
        g_ctl_had_file = have;
        if (g_ctl.present && !c.present) g_generation++;   /* unplugged: old handles die */
        g_ctl = c;
        st_control_reads++;
    }
    out = g_ctl;
    pthread_mutex_unlock(&g_lock);
    return out;
}

/* ---------------------------------------------------------------- handles */
static int dev_live(rtlsdr_dev_t *dev) {
    if (dev && dev->magic == MAGIC_LIVE) return 1;
    pthread_mutex_lock(&g_lock);
    st_stale++;
    pthread_mutex_unlock(&g_lock);
    return 0;
}

/* The device behind a live handle is gone (unplugged, possibly plugged in again since). */
static int dev_lost(rtlsdr_dev_t *dev, const struct control *c) {
    unsigned gen;
    pthread_mutex_lock(&g_lock);
    gen = g_generation;
    pthread_mutex_unlock(&g_lock);
    return !c->present || dev->generation != gen;
}

/* Start of every call on a handle: 0 if usable, else the error to return. */
static int dev_enter(rtlsdr_dev_t *dev) {
    if (!dev_live(dev)) return -1;
    struct control c = ctl_poll(1);
    if (dev_lost(dev, &c)) return -1;   /* a control transfer to a gone device: LIBUSB_ERROR_IO */
    return 0;
}

static double now_s(void) {
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static void sleep_until(double t_s) {
    struct timespec ts;
    ts.tv_sec = (time_t)t_s;
    ts.tv_nsec = (long)((t_s - (double)ts.tv_sec) * 1e9);
    if (ts.tv_nsec >= 1000000000L) { ts.tv_sec++; ts.tv_nsec -= 1000000000L; }
    while (clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &ts, NULL) == EINTR) {}
}

/* ---------------------------------------------------------------- samples */
static inline uint64_t xorshift64s(uint64_t *s) {
    uint64_t x = *s;
    x ^= x >> 12; x ^= x << 25; x ^= x >> 27;
    *s = x;
    return x * 0x2545F4914F6CDD1DULL;
}

static inline unsigned char to_u8(double v) {
    long r = lround(v);
    return (unsigned char)(r < 0 ? 0 : r > 255 ? 255 : r);
}

/* Fill n bytes (n even) of the stream with the current centre frequency. */
static void generate(rtlsdr_dev_t *dev, const struct control *c, unsigned char *buf, uint32_t n) {
    if (c->counter || dev->testmode) {
        for (uint32_t i = 0; i < n; i++) buf[i] = (unsigned char)(dev->stream_bytes + i);
        dev->stream_bytes += n;
        return;
    }
    uint32_t fc = __atomic_load_n(&dev->freq, __ATOMIC_RELAXED);
    double fs = dev->rate_real;
    double f_bb = c->tone_hz - (double)fc;               /* tone at baseband, Hz */
    int tone = fabs(f_bb) < 0.5 * fs && c->tone_amp > 0;
    double w = 2.0 * M_PI * f_bb / fs;                   /* rad per sample */
    double cw = cos(w), sw = sin(w);
    /* Irwin-Hall of four U(0,1): mean 2, variance 1/3; scale to noise_rms per component */
    double k = c->noise_rms / sqrt(1.0 / 3.0) / 65536.0;
    double re = dev->tone_re, im = dev->tone_im;
    for (uint32_t i = 0; i + 1 < n; i += 2) {
        uint64_t a = xorshift64s(&dev->rng), b = xorshift64s(&dev->rng);
        double ni = (double)((a & 0xffff) + ((a >> 16) & 0xffff) + ((a >> 32) & 0xffff) +
                             (a >> 48)) - 2.0 * 65535.0;
        double nq = (double)((b & 0xffff) + ((b >> 16) & 0xffff) + ((b >> 32) & 0xffff) +
                             (b >> 48)) - 2.0 * 65535.0;
        double vi = 127.5 + k * ni, vq = 127.5 + k * nq;
        if (tone) {
            vi += c->tone_amp * re;
            vq += c->tone_amp * im;
            double r2 = re * cw - im * sw;
            im = re * sw + im * cw;
            re = r2;
        }
        buf[i] = to_u8(vi);
        buf[i + 1] = to_u8(vq);
    }
    double mag = hypot(re, im);                          /* keep the phasor on the unit circle */
    if (mag > 0) { re /= mag; im /= mag; } else { re = 1; im = 0; }
    dev->tone_re = re; dev->tone_im = im;
    dev->stream_bytes += n;
}

enum { FILLED = 0, CANCELLED = 1, LOST = 2 };

/* Produce one transfer of `want` bytes in real time into buf: FILLED, CANCELLED or LOST
 * (unplugged: *rc_out gets the control file's unplug_rc). */
static int fill_transfer(rtlsdr_dev_t *dev, unsigned char *buf, uint32_t want, double *next_s,
                         int *rc_out) {
    uint32_t slice = 2u * (uint32_t)ceil(dev->rate_real * SLICE_S);
    uint32_t filled = 0;
    while (filled < want) {
        uint32_t chunk = want - filled < slice ? want - filled : slice;
        *next_s += 0.5 * chunk / dev->rate_real;
        double now = now_s();
        if (*next_s < now - 1.0) *next_s = now;   /* stalled (debugger, suspend): no burst */
        sleep_until(*next_s);
        struct control c = ctl_poll(0);
        if (dev_lost(dev, &c)) { *rc_out = c.unplug_rc; return LOST; }
        if (__atomic_load_n(&dev->async_status, __ATOMIC_ACQUIRE) == CANCELING) return CANCELLED;
        if (c.stall) {                            /* wedged: time passes, nothing comes */
            *next_s = now_s();
            continue;
        }
        generate(dev, &c, buf + filled, chunk);
        filled += chunk;
    }
    return FILLED;
}

/* Length of the next transfer: short (half, even) every Nth one when asked. */
static uint32_t next_length(rtlsdr_dev_t *dev, uint32_t len) {
    struct control c = ctl_poll(0);
    dev->xfers++;
    int is_short = c.short_every > 0 && dev->xfers % c.short_every == 0;
    uint32_t n = is_short ? (len / 2) & ~1u : len;
    pthread_mutex_lock(&g_lock);
    st_transfers++;
    if (is_short) st_short++;
    st_bytes += n;
    pthread_mutex_unlock(&g_lock);
    return n;
}

/* ---------------------------------------------------------------- enumeration */
API uint32_t rtlsdr_get_device_count(void) {
    struct control c = ctl_poll(1);
    return c.present ? 1u : 0u;
}

API const char *rtlsdr_get_device_name(uint32_t index) {
    struct control c = ctl_poll(1);
    return (c.present && index == 0) ? DEVNAME : "";
}

API int rtlsdr_get_device_usb_strings(uint32_t index, char *manufact, char *product,
                                      char *serial) {
    struct control c = ctl_poll(1);
    if (!c.present || index != 0) return -2;
    if (manufact) { memset(manufact, 0, 256); strcpy(manufact, MANUFACT); }
    if (product) { memset(product, 0, 256); strcpy(product, PRODUCT); }
    if (serial) { memset(serial, 0, 256); strcpy(serial, SERIAL); }
    return 0;
}

API int rtlsdr_get_index_by_serial(const char *serial) {
    struct control c = ctl_poll(1);
    if (!serial) return -1;
    if (!c.present) return -2;            /* no devices */
    return strcmp(serial, SERIAL) == 0 ? 0 : -3;
}

API int rtlsdr_open(rtlsdr_dev_t **out_dev, uint32_t index) {
    struct control c = ctl_poll(1);
    if (!out_dev) return -1;
    *out_dev = NULL;
    pthread_mutex_lock(&g_lock);
    if (!c.present || index != 0) {
        st_open_fails++;
        pthread_mutex_unlock(&g_lock);
        return -1;
    }
    for (int i = 0; i < g_nhandles; i++) {
        rtlsdr_dev_t *h = g_handles[i];
        if (h->magic == MAGIC_LIVE && h->generation == g_generation) {
            st_open_fails++;
            pthread_mutex_unlock(&g_lock);
            return -6;                    /* LIBUSB_ERROR_BUSY: claimed by an open handle */
        }
    }
    if (g_nhandles >= MAX_HANDLES) {
        pthread_mutex_unlock(&g_lock);
        return -11;                       /* LIBUSB_ERROR_NO_MEM */
    }
    rtlsdr_dev_t *dev = calloc(1, sizeof *dev);
    if (!dev) {
        pthread_mutex_unlock(&g_lock);
        return -11;
    }
    dev->magic = MAGIC_LIVE;
    dev->generation = g_generation;
    dev->index = index;
    dev->rate = 2048000; dev->rate_real = 2048000.0;
    dev->freq = 0;
    dev->xtal_rtl = dev->xtal_tuner = XTAL_HZ;
    dev->dither = 1;
    dev->rng = 0x9E3779B97F4A7C15ULL ^ ((uint64_t)(st_opens + 1) * 0xD1B54A32D192ED03ULL);
    dev->tone_re = 1.0; dev->tone_im = 0.0;
    g_handles[g_nhandles++] = dev;
    st_opens++;
    pthread_mutex_unlock(&g_lock);
    *out_dev = dev;
    return 0;
}

API int rtlsdr_cancel_async(rtlsdr_dev_t *dev);

API int rtlsdr_close(rtlsdr_dev_t *dev) {
    if (!dev_live(dev)) return -1;
    ctl_poll(1);
    if (__atomic_load_n(&dev->async_status, __ATOMIC_ACQUIRE) != INACTIVE) {
        pthread_mutex_lock(&g_lock);
        st_close_streaming++;
        pthread_mutex_unlock(&g_lock);
        int running = RUNNING;
        __atomic_compare_exchange_n(&dev->async_status, &running, CANCELING, 0,
                                    __ATOMIC_ACQ_REL, __ATOMIC_ACQUIRE);
        while (__atomic_load_n(&dev->async_status, __ATOMIC_ACQUIRE) != INACTIVE)
            sleep_until(now_s() + 0.001);
    }
    pthread_mutex_lock(&g_lock);
    dev->magic = MAGIC_DEAD;              /* kept, never freed: later use is counted */
    st_closes++;
    pthread_mutex_unlock(&g_lock);
    return 0;
}

/* ---------------------------------------------------------------- configuration */
API int rtlsdr_set_xtal_freq(rtlsdr_dev_t *dev, uint32_t rtl_freq, uint32_t tuner_freq) {
    int r = dev_enter(dev);
    if (r) return r;
    if (rtl_freq > 0 && (rtl_freq < 28000000u || rtl_freq > 29600000u)) return -2;
    if (rtl_freq > 0) dev->xtal_rtl = rtl_freq;
    if (tuner_freq > 0) dev->xtal_tuner = tuner_freq;
    return 0;
}

API int rtlsdr_get_xtal_freq(rtlsdr_dev_t *dev, uint32_t *rtl_freq, uint32_t *tuner_freq) {
    int r = dev_enter(dev);
    if (r) return r;
    if (rtl_freq) *rtl_freq = dev->xtal_rtl;
    if (tuner_freq) *tuner_freq = dev->xtal_tuner;
    return 0;
}

API int rtlsdr_set_center_freq(rtlsdr_dev_t *dev, uint32_t freq) {
    int r = dev_enter(dev);
    if (r) return r;
    struct control c = ctl_poll(1);
    pthread_mutex_lock(&g_lock);
    if (c.retune_fail) {
        st_retune_fail++;
        pthread_mutex_unlock(&g_lock);
        return -1;
    }
    st_retunes++;
    g_tunes[g_ntunes % MAX_TUNES] = freq;
    g_ntunes++;
    pthread_mutex_unlock(&g_lock);
    __atomic_store_n(&dev->freq, freq, __ATOMIC_RELAXED);
    return 0;
}

API uint32_t rtlsdr_get_center_freq(rtlsdr_dev_t *dev) {
    if (dev_enter(dev)) return 0;
    return __atomic_load_n(&dev->freq, __ATOMIC_RELAXED);
}

API int rtlsdr_set_freq_correction(rtlsdr_dev_t *dev, int ppm) {
    int r = dev_enter(dev);
    if (r) return r;
    if (dev->corr_ppm == ppm) return -2;
    dev->corr_ppm = ppm;
    return 0;
}

API int rtlsdr_get_freq_correction(rtlsdr_dev_t *dev) {
    if (dev_enter(dev)) return 0;
    return dev->corr_ppm;
}

API int rtlsdr_get_tuner_type(rtlsdr_dev_t *dev) {
    if (dev_enter(dev)) return 0;          /* RTLSDR_TUNER_UNKNOWN */
    return 5;                              /* RTLSDR_TUNER_R820T */
}

API int rtlsdr_get_tuner_gains(rtlsdr_dev_t *dev, int *gains) {
    if (!dev_live(dev)) return -1;
    if (gains) memcpy(gains, R820T_GAINS, sizeof R820T_GAINS);
    return N_GAINS;
}

API int rtlsdr_set_tuner_gain(rtlsdr_dev_t *dev, int gain) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->gain = gain;
    return 0;
}

API int rtlsdr_get_tuner_gain(rtlsdr_dev_t *dev) {
    if (dev_enter(dev)) return 0;
    return dev->gain;
}

API int rtlsdr_set_tuner_gain_mode(rtlsdr_dev_t *dev, int manual) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->manual_gain = manual != 0;
    return 0;
}

API int rtlsdr_set_agc_mode(rtlsdr_dev_t *dev, int on) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->agc = on != 0;
    return 0;
}

API int rtlsdr_set_direct_sampling(rtlsdr_dev_t *dev, int on) {
    int r = dev_enter(dev);
    if (r) return r;
    if (on < 0 || on > 2) return -1;
    dev->direct = on;
    return 0;
}

API int rtlsdr_set_dithering(rtlsdr_dev_t *dev, int on) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->dither = on != 0;
    return 0;
}

API int rtlsdr_set_testmode(rtlsdr_dev_t *dev, int on) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->testmode = on != 0;
    return 0;
}

API int rtlsdr_set_sample_rate(rtlsdr_dev_t *dev, uint32_t samp_rate) {
    int r = dev_enter(dev);
    if (r) return r;
    if (samp_rate <= 225000 || samp_rate > 3200000 || (samp_rate > 300000 && samp_rate <= 900000))
        return -22;                        /* -EINVAL */
    /* librtlsdr: rsamp_ratio = (xtal * 2^22) / rate, low two bits cleared */
    uint64_t ratio = ((uint64_t)dev->xtal_rtl << 22) / samp_rate;
    ratio &= 0x0ffffffcULL;
    double real = (double)((uint64_t)dev->xtal_rtl << 22) / (double)ratio;
    dev->rate = (uint32_t)real;
    dev->rate_real = real;
    return 0;
}

API uint32_t rtlsdr_get_sample_rate(rtlsdr_dev_t *dev) {
    if (dev_enter(dev)) return 0;
    return dev->rate;
}

API int rtlsdr_set_tuner_bandwidth(rtlsdr_dev_t *dev, uint32_t bw) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->bw = bw;
    return 0;
}

API int rtlsdr_set_and_get_tuner_bandwidth(rtlsdr_dev_t *dev, uint32_t bw, uint32_t *applied_bw,
                                           int apply_bw) {
    int r = dev_enter(dev);
    if (r) return r;
    if (applied_bw) *applied_bw = bw;
    if (apply_bw) dev->bw = bw;
    return 0;
}

static int g_last_bias = -1;   /* the last state any handle set the bias tee to */

API int rtlsdr_set_bias_tee(rtlsdr_dev_t *dev, int on) {
    int r = dev_enter(dev);
    if (r) return r;
    /* librtlsdr: GPIO 0 as output, set to `on` */
    dev->gpio_dir |= 1;
    dev->gpio_val = on ? (dev->gpio_val | 1) : (dev->gpio_val & ~1);
    dev->bias_tee = on != 0;
    g_last_bias = dev->bias_tee;
    return 0;
}

API int rtlsdr_set_gpio_output(rtlsdr_dev_t *dev, uint8_t gpio) {
    int r = dev_enter(dev);
    if (r) return r;
    if (gpio > 7) return -1;
    dev->gpio_dir |= 1 << gpio;
    return 0;
}

API int rtlsdr_set_gpio_input(rtlsdr_dev_t *dev, uint8_t gpio) {
    int r = dev_enter(dev);
    if (r) return r;
    if (gpio > 7) return -1;
    dev->gpio_dir &= ~(1 << gpio);
    return 0;
}

API int rtlsdr_set_gpio_bit(rtlsdr_dev_t *dev, uint8_t gpio, int val) {
    int r = dev_enter(dev);
    if (r) return r;
    if (gpio > 7) return -1;
    dev->gpio_val = val ? (dev->gpio_val | (1 << gpio)) : (dev->gpio_val & ~(1 << gpio));
    if (gpio == 0) dev->bias_tee = val != 0;
    return 0;
}

API int rtlsdr_get_gpio_bit(rtlsdr_dev_t *dev, uint8_t gpio, int *val) {
    int r = dev_enter(dev);
    if (r) return r;
    if (gpio > 7 || !val) return -1;
    *val = (dev->gpio_val >> gpio) & 1;
    return 0;
}

API int rtlsdr_set_gpio_byte(rtlsdr_dev_t *dev, int val) {
    int r = dev_enter(dev);
    if (r) return r;
    dev->gpio_val = val & 0xff;
    dev->bias_tee = val & 1;
    return 0;
}

API int rtlsdr_get_gpio_byte(rtlsdr_dev_t *dev, int *val) {
    int r = dev_enter(dev);
    if (r) return r;
    if (!val) return -1;
    *val = dev->gpio_val;
    return 0;
}

API int rtlsdr_set_gpio_status(rtlsdr_dev_t *dev, int *status) {
    int r = dev_enter(dev);
    if (r) return r;
    if (!status) return -1;
    *status = dev->gpio_dir;               /* the GPD register: a read, despite the name */
    return 0;
}

/* ---------------------------------------------------------------- streaming */
API int rtlsdr_reset_buffer(rtlsdr_dev_t *dev) {
    return dev_enter(dev);
}

API int rtlsdr_read_sync(rtlsdr_dev_t *dev, void *buf, int len, int *n_read) {
    if (!dev_live(dev)) return -1;
    struct control c = ctl_poll(1);
    if (n_read) *n_read = 0;
    if (dev_lost(dev, &c)) return c.unplug_rc;
    if (!buf || len < 0) return -2;
    uint32_t want = next_length(dev, (uint32_t)len & ~1u);
    double next = now_s();
    int rc = 0;
    if (fill_transfer(dev, buf, want, &next, &rc) == LOST) return rc;
    if (n_read) *n_read = (int)want;
    return 0;
}

API int rtlsdr_read_async(rtlsdr_dev_t *dev, rtlsdr_read_async_cb_t cb, void *ctx,
                          uint32_t buf_num, uint32_t buf_len) {
    (void)buf_num;
    if (!dev_live(dev)) return -1;
    struct control c = ctl_poll(1);
    if (dev_lost(dev, &c)) return c.unplug_rc;
    int inactive = INACTIVE;
    if (!__atomic_compare_exchange_n(&dev->async_status, &inactive, RUNNING, 0,
                                     __ATOMIC_ACQ_REL, __ATOMIC_ACQUIRE))
        return -2;
    uint32_t len = (buf_len > 0 && buf_len % 512 == 0) ? buf_len : DEFAULT_BUF_LEN;
    unsigned char *buf = malloc(len);
    if (!buf) {
        __atomic_store_n(&dev->async_status, INACTIVE, __ATOMIC_RELEASE);
        return -11;
    }
    pthread_mutex_lock(&g_lock);
    st_async_running++;
    pthread_mutex_unlock(&g_lock);
    int rc = 0;
    double next = now_s();
    for (;;) {
        uint32_t want = next_length(dev, len);
        int r = fill_transfer(dev, buf, want, &next, &rc);
        if (r != FILLED) break;            /* cancelled (rc 0) or unplugged (rc unplug_rc) */
        if (cb) cb(buf, want, ctx);
        if (__atomic_load_n(&dev->async_status, __ATOMIC_ACQUIRE) == CANCELING) break;
    }
    free(buf);
    pthread_mutex_lock(&g_lock);
    st_async_running--;
    pthread_mutex_unlock(&g_lock);
    __atomic_store_n(&dev->async_status, INACTIVE, __ATOMIC_RELEASE);
    return rc;
}

API int rtlsdr_wait_async(rtlsdr_dev_t *dev, rtlsdr_read_async_cb_t cb, void *ctx) {
    return rtlsdr_read_async(dev, cb, ctx, 0, 0);
}

API int rtlsdr_cancel_async(rtlsdr_dev_t *dev) {
    if (!dev_live(dev)) return -1;
    ctl_poll(1);
    int running = RUNNING;
    if (__atomic_compare_exchange_n(&dev->async_status, &running, CANCELING, 0,
                                    __ATOMIC_ACQ_REL, __ATOMIC_ACQUIRE)) {
        pthread_mutex_lock(&g_lock);
        st_cancels++;
        pthread_mutex_unlock(&g_lock);
        return 0;
    }
    return -2;
}

/* ---------------------------------------------------------------- test hooks */
/* A counter by name (-1 if unknown): opens, open_fails, closes, open_handles, transfers,
 * short_transfers, bytes, retunes, retune_failures, stale_calls, close_while_streaming,
 * control_reads, async_running, cancels, bias_tee (of the newest live handle; -1 if none),
 * bias_tee_last (the last state any handle set the bias tee to; -1 if never set). */
API long long fakertl_stat(const char *name) {
    if (name && !strcmp(name, "bias_tee_last")) return g_last_bias;  /* any handle, even closed */
    long long v = -1;
    if (!name) return -1;
    pthread_mutex_lock(&g_lock);
    if (!strcmp(name, "opens")) v = st_opens;
    else if (!strcmp(name, "open_fails")) v = st_open_fails;
    else if (!strcmp(name, "closes")) v = st_closes;
    else if (!strcmp(name, "transfers")) v = st_transfers;
    else if (!strcmp(name, "short_transfers")) v = st_short;
    else if (!strcmp(name, "bytes")) v = st_bytes;
    else if (!strcmp(name, "retunes")) v = st_retunes;
    else if (!strcmp(name, "retune_failures")) v = st_retune_fail;
    else if (!strcmp(name, "stale_calls")) v = st_stale;
    else if (!strcmp(name, "close_while_streaming")) v = st_close_streaming;
    else if (!strcmp(name, "control_reads")) v = st_control_reads;
    else if (!strcmp(name, "async_running")) v = st_async_running;
    else if (!strcmp(name, "cancels")) v = st_cancels;
    else if (!strcmp(name, "open_handles") || !strcmp(name, "bias_tee")) {
        long long n = 0, bias = -1;
        for (int i = 0; i < g_nhandles; i++)
            if (g_handles[i]->magic == MAGIC_LIVE) { n++; bias = g_handles[i]->bias_tee; }
        v = !strcmp(name, "open_handles") ? n : bias;
    }
    pthread_mutex_unlock(&g_lock);
    return v;
}

/* Successful set_center_freq calls since the last reset, oldest first: copies up to `max`
 * of the newest min(total, 8192) into out and returns the total count. */
API int fakertl_tunes(uint32_t *out, int max) {
    pthread_mutex_lock(&g_lock);
    long long n = g_ntunes, kept = n < MAX_TUNES ? n : MAX_TUNES;
    long long first = n - kept;
    for (long long i = 0; out && i < kept && i < max; i++) out[i] = g_tunes[(first + i) % MAX_TUNES];
    pthread_mutex_unlock(&g_lock);
    return (int)n;
}

/* Zero the counters and the tune log (not the handles or the control state). */
API void fakertl_reset(void) {
    pthread_mutex_lock(&g_lock);
    st_opens = st_open_fails = st_closes = st_transfers = st_short = st_bytes = 0;
    st_retunes = st_retune_fail = st_stale = st_close_streaming = st_control_reads = 0;
    st_cancels = 0;
    g_ntunes = 0;
    pthread_mutex_unlock(&g_lock);
}
