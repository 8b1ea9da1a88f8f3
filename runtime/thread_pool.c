/* Worker threads for row-range kernels, shared by every native kernel of the
 * process (built through the cache by treeflux/runtime/kernel.py).
 *
 * tf_pool_run(kind, args, bounds, count, results) evaluates `count` row
 * ranges [bounds[i], bounds[i+1]) of one kernel call side by side and writes
 * each range's status into results[i]. The caller runs range 0 itself, then
 * claims and runs every range no worker has claimed yet, then waits for the
 * ranges workers are running. So a call is never much slower than running it
 * all in the caller, even when the workers are asleep (waking a sleeping
 * thread on an idle vCPU took 80-100 us here, more than a whole 1,024-row
 * call); a worker that is awake (it spins for a while after each call before
 * it sleeps) joins within a microsecond or so.
 *
 * Workers are kept off the caller's core (sched_setaffinity): Linux tends to
 * wake a thread beside its waker, and then both share one core for the call.
 *
 * One call at a time: a second caller that finds the pool busy runs its
 * ranges alone. After fork() the child forgets the parent's workers.
 *
 * kinds (args[0] is the kernel's address):
 *   0  int32 rows(X, out, start, stop)                args: fn, X, out
 *   1  int64 checked(X, out, status, start, stop)     args: fn, X, out, status
 *   2  int64 gth(tape, rates, out, a, b, groups, err)  args: fn, tape, rates, out, groups, err
 *      (err of range i at err + 3 i)
 */
#define _GNU_SOURCE
#include <pthread.h>
#include <sched.h>
#include <stdatomic.h>
#include <stdint.h>
#include <time.h>
#include <unistd.h>
#include <sys/syscall.h>

#if defined(__x86_64__) || defined(__i386__)
#define RELAX() __builtin_ia32_pause()
#elif defined(__aarch64__)
#define RELAX() __asm__ __volatile__("yield")
#else
#define RELAX() ((void)0)
#endif

#define MAX_RANGES 64

typedef int32_t (*rows_fn)(void *, void *, int64_t, int64_t);
typedef int64_t (*checked_fn)(void *, void *, void *, int64_t, int64_t);
typedef int64_t (*gth_fn)(void *, void *, void *, int64_t, int64_t, int64_t, int64_t *);

static int64_t call(int64_t kind, const int64_t *args, int64_t i, int64_t a, int64_t b)
{
    switch (kind) {
    case 0:
        return ((rows_fn)(intptr_t)args[0])((void *)(intptr_t)args[1], (void *)(intptr_t)args[2], a, b);
    case 1:
        return ((checked_fn)(intptr_t)args[0])((void *)(intptr_t)args[1], (void *)(intptr_t)args[2],
                                               (void *)(intptr_t)args[3], a, b);
    default:
        return ((gth_fn)(intptr_t)args[0])((void *)(intptr_t)args[1], (void *)(intptr_t)args[2],
                                           (void *)(intptr_t)args[3], a, b, args[4],
                                           (int64_t *)(intptr_t)args[5] + 3 * i);
    }
}

/* the call being run; `claim` holds (call number << 8) | first unclaimed
 * range, so a worker that woke for an older call can never claim a range of
 * a newer one (its compare-and-swap fails on the call number), and a
 * successful claim means the call is still handing out ranges, so the job_
 * fields are that call's. */
static int64_t job_kind;
static const int64_t *job_args, *job_bounds;
static int64_t *job_results;
static int64_t job_count;
static atomic_uint_fast64_t claim;
static atomic_int_fast64_t running;      /* threads inside drain() */

static atomic_uint_fast64_t generation;  /* bumped per call: wakes the workers */
static atomic_int sleepers;
static pthread_mutex_t sleep_lock = PTHREAD_MUTEX_INITIALIZER;
static pthread_cond_t wake = PTHREAD_COND_INITIALIZER;
static pthread_mutex_t call_lock = PTHREAD_MUTEX_INITIALIZER;

static int n_workers;
static pid_t worker_tid[MAX_RANGES];
static int worker_off[MAX_RANGES];       /* the core each worker is kept off (-1: none) */
static atomic_int started;
static cpu_set_t allowed;
static int have_allowed;
static int64_t spin_ns = 1000000;        /* a worker spins this long after a call, then sleeps */

static int64_t now_ns(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (int64_t)t.tv_sec * 1000000000 + t.tv_nsec;
}

/* Claim and run ranges of call `gen` until none is left. */
static void drain(uint_fast64_t gen)
{
    atomic_fetch_add(&running, 1);
    for (;;) {
        uint_fast64_t v = atomic_load(&claim);
        if ((v >> 8) != (gen & (UINT64_MAX >> 8)))
            break;
        int64_t i = (int64_t)(v & 255);
        if (i >= job_count)
            break;
        if (atomic_compare_exchange_weak(&claim, &v, v + 1))
            job_results[i] = call(job_kind, job_args, i, job_bounds[i], job_bounds[i + 1]);
    }
    atomic_fetch_sub(&running, 1);
}

static void *worker_main(void *arg)
{
    int me = (int)(intptr_t)arg;
    worker_tid[me] = (pid_t)syscall(SYS_gettid);
    atomic_fetch_add(&started, 1);
    uint_fast64_t seen = atomic_load(&generation);
    for (;;) {
        uint_fast64_t g = atomic_load(&generation);
        if (g == seen) {
            int64_t until = now_ns() + spin_ns;
            for (int k = 0; (g = atomic_load(&generation)) == seen; k++) {
                RELAX();
                if ((k & 255) == 255 && now_ns() > until)
                    break;
            }
            if (g == seen) {
                pthread_mutex_lock(&sleep_lock);
                atomic_fetch_add(&sleepers, 1);
                while ((g = atomic_load(&generation)) == seen)
                    pthread_cond_wait(&wake, &sleep_lock);
                atomic_fetch_sub(&sleepers, 1);
                pthread_mutex_unlock(&sleep_lock);
            }
        }
        seen = g;
        drain(g);
    }
    return NULL;
}

/* Keep every worker off core `cpu` (the caller's), if the system lets us. */
static void keep_off(int cpu)
{
    if (cpu < 0 || !have_allowed || CPU_COUNT(&allowed) < 2)
        return;
    for (int w = 0; w < n_workers; w++) {
        if (worker_off[w] == cpu || worker_tid[w] == 0)
            continue;
        cpu_set_t set = allowed;
        CPU_CLR(cpu, &set);
        sched_setaffinity(worker_tid[w], sizeof set, &set);
        worker_off[w] = cpu;
    }
}

static void forget(void)                 /* in a forked child: only the forking thread exists */
{
    n_workers = 0;
    atomic_store(&started, 0);
    atomic_store(&sleepers, 0);
    atomic_store(&running, 0);           /* the parent's workers may have been inside drain() */
    atomic_store(&claim, 0);
    pthread_mutex_init(&sleep_lock, NULL);
    pthread_cond_init(&wake, NULL);
    pthread_mutex_init(&call_lock, NULL);
}

static void grow(int want)
{
    static int registered;
    if (!registered) {
        pthread_atfork(NULL, NULL, forget);
        registered = 1;
        have_allowed = sched_getaffinity(0, sizeof allowed, &allowed) == 0;
    }
    while (n_workers < want) {
        pthread_t t;
        pthread_attr_t attr;
        pthread_attr_init(&attr);
        pthread_attr_setdetachstate(&attr, PTHREAD_CREATE_DETACHED);
        worker_tid[n_workers] = 0;
        worker_off[n_workers] = -1;
        int bad = pthread_create(&t, &attr, worker_main, (void *)(intptr_t)n_workers);
        pthread_attr_destroy(&attr);
        if (bad)
            break;
        n_workers++;
    }
    while (atomic_load(&started) < n_workers)   /* their thread ids, for keep_off */
        RELAX();
}

void tf_pool_set_spin(int64_t ns) { spin_ns = ns < 0 ? 0 : ns; }

void tf_pool_run(int64_t kind, const int64_t *args, const int64_t *bounds, int64_t count,
                 int64_t *results)
{
    if (count <= 0)
        return;
    if (count == 1 || count > MAX_RANGES || pthread_mutex_trylock(&call_lock) != 0) {
        for (int64_t i = 0; i < count; i++)
            results[i] = call(kind, args, i, bounds[i], bounds[i + 1]);
        return;
    }
    grow((int)count - 1);
    keep_off(sched_getcpu());
    uint_fast64_t gen = atomic_load(&generation) + 1;
    job_kind = kind;
    job_args = args;
    job_bounds = bounds;
    job_results = results;
    job_count = count;
    atomic_store(&claim, (gen << 8) | 1);     /* range 0 is the caller's */
    atomic_store(&generation, gen);
    if (atomic_load(&sleepers) > 0) {
        pthread_mutex_lock(&sleep_lock);
        pthread_cond_broadcast(&wake);
        pthread_mutex_unlock(&sleep_lock);
    }
    results[0] = call(kind, args, 0, bounds[0], bounds[1]);
    drain(gen);
    /* every range is claimed now: wait for the workers still running one
     * (a worker that claims nothing leaves at once) */
    while (atomic_load(&running) > 0)
        RELAX();
    pthread_mutex_unlock(&call_lock);
}
