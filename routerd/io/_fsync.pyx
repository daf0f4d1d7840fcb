# cython: language_level=3, boundscheck=False, wraparound=False
"""The journal writer thread's loop in C, run without the GIL (routerd.io.journal.Syncer).

Why: the Python loop of :class:`routerd.io.journal.Syncer` needs the interpreter's lock
after every fdatasync (and after its wake-up write and condition wait), so each group
commit took the lock from the service's loop thread two or three times; on a busy
2-core host the loop thread then stood still until the writer thread got a core
(CPython hands the lock over and waits for the other thread to take it).  Measured
in process on 1,024-row batches (tests aside): 310-400 us of loop time a batch with the
Python writer thread, 205 us with no writer thread at all.  Here the thread runs
:meth:`Writer.run`, which enters a ``nogil`` loop and leaves it only at :meth:`Writer.stop`:
the loop thread never waits for it.

The same protocol as the Python loop (its docstring is the theory of operation): wait
until a record above the durable one is requested, fdatasync the journal's descriptor
(which covers every record written before the call), publish the requested number as
durable (or keep the error and stop syncing), write one byte to the wake pipe.  The
descriptor lives here under ``fd_lock``, which the loop holds across each fdatasync;
the journal takes it (:meth:`lock_fd` / :meth:`unlock_fd`, through
``journal._fd_lock``) whenever it closes or replaces its descriptor, so a sync never
meets a closed or reused descriptor, as the Python loop's ``Journal._fd_lock`` ensures.
Linux/POSIX only (pthreads); built by setup.py beside the engine's kernels, optional.
"""
from libc.stdint cimport int64_t

cdef extern from "<pthread.h>" nogil:
    ctypedef struct pthread_mutex_t:
        pass
    ctypedef struct pthread_cond_t:
        pass
    int pthread_mutex_init(pthread_mutex_t *m, const void *attr)
    int pthread_mutex_destroy(pthread_mutex_t *m)
    int pthread_mutex_lock(pthread_mutex_t *m)
    int pthread_mutex_unlock(pthread_mutex_t *m)
    int pthread_cond_init(pthread_cond_t *c, const void *attr)
    int pthread_cond_destroy(pthread_cond_t *c)
    int pthread_cond_wait(pthread_cond_t *c, pthread_mutex_t *m)
    int pthread_cond_signal(pthread_cond_t *c)

cdef extern from "<unistd.h>" nogil:
    int fdatasync(int fd)
    ssize_t write(int fd, const void *buf, size_t n)

cdef extern from "<errno.h>" nogil:
    int errno
    int EBADF


cdef class Writer:
    """One journal's writer thread state.  ``durable``: the record number the journal is
    known durable up to at the start; ``fd``: its descriptor; ``wake_fd``: the write end
    of the wake pipe (non-blocking).  The owner starts a thread on :meth:`run`."""
    cdef pthread_mutex_t mu        # target, durable, syncs, err, stopping
    cdef pthread_cond_t cv
    cdef pthread_mutex_t fd_mu     # fd, and held across each fdatasync
    cdef int fd, wake_fd, err
    cdef int64_t target, durable_, syncs_
    cdef bint stopping, ready

    def __cinit__(self, int64_t durable, int fd, int wake_fd):
        pthread_mutex_init(&self.mu, NULL)
        pthread_mutex_init(&self.fd_mu, NULL)
        pthread_cond_init(&self.cv, NULL)
        self.ready = True
        self.durable_ = durable
        self.target = durable
        self.fd = fd
        self.wake_fd = wake_fd
        self.err = 0
        self.syncs_ = 0
        self.stopping = False

    def __dealloc__(self):
        if self.ready:
            pthread_cond_destroy(&self.cv)
            pthread_mutex_destroy(&self.fd_mu)
            pthread_mutex_destroy(&self.mu)

    def run(self):
        """The thread's body: returns once :meth:`stop` was called."""
        with nogil:
            self._loop()

    cdef void _loop(self) noexcept nogil:
        cdef int64_t upto
        cdef int rc, e
        cdef char b = 115      # b"s"
        while True:
            pthread_mutex_lock(&self.mu)
            while not self.stopping and (self.target <= self.durable_ or self.err != 0):
                pthread_cond_wait(&self.cv, &self.mu)
            if self.stopping:
                pthread_mutex_unlock(&self.mu)
                return
            upto = self.target
            pthread_mutex_unlock(&self.mu)
            pthread_mutex_lock(&self.fd_mu)
            if self.fd < 0:
                rc = -1
                e = EBADF
            else:
                rc = fdatasync(self.fd)
                e = errno if rc != 0 else 0
            pthread_mutex_unlock(&self.fd_mu)
            pthread_mutex_lock(&self.mu)
            if rc != 0:
                self.err = e if e != 0 else EBADF
            else:
                self.syncs_ += 1
                if upto > self.durable_:
                    self.durable_ = upto
            pthread_mutex_unlock(&self.mu)
            write(self.wake_fd, &b, 1)      # a full pipe already says "look"

    def request(self, int64_t upto):
        """Ask for every record up to ``upto`` (already written) to be made durable.  (The
        loop never holds ``mu`` for long nor needs the GIL: taken with the GIL held.)"""
        pthread_mutex_lock(&self.mu)
        if upto > self.target:
            self.target = upto
            pthread_cond_signal(&self.cv)
        pthread_mutex_unlock(&self.mu)

    def state(self):
        """(durable record number, syncs done, errno of the failed sync or 0)."""
        cdef int64_t d, s
        cdef int e
        pthread_mutex_lock(&self.mu)
        d = self.durable_
        s = self.syncs_
        e = self.err
        pthread_mutex_unlock(&self.mu)
        return d, s, e

    @property
    def durable(self):
        cdef int64_t d
        pthread_mutex_lock(&self.mu)
        d = self.durable_
        pthread_mutex_unlock(&self.mu)
        return d

    def stop(self):
        """End :meth:`run` (a sync in progress finishes first)."""
        pthread_mutex_lock(&self.mu)
        self.stopping = True
        pthread_cond_signal(&self.cv)
        pthread_mutex_unlock(&self.mu)

    def lock_fd(self):
        """Take the descriptor's lock (waits, without the GIL, for a sync in progress)."""
        with nogil:
            pthread_mutex_lock(&self.fd_mu)

    def unlock_fd(self, int fd):
        """Release it, with the journal's descriptor as it now is (-1: closed)."""
        self.fd = fd
        pthread_mutex_unlock(&self.fd_mu)
