/*
 * durable.c: files that survive a crash whole or not at all. Checkpoints
 * and webhook spool files are written to a temporary name, synced,
 * renamed over the final name and the directory synced, so a reader sees
 * either the old file or the complete new one, never a torn one; and a
 * rename the kernel acknowledged is on disk.
 */
#include <sys/stat.h>

#include <errno.h>
#include <fcntl.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "daemon.h"

static int
durable_write_all(int fd, const char *p, size_t len)
{
	ssize_t n;

	while (len > 0) {
		n = write(fd, p, len);
		if (n == -1) {
			if (errno == EINTR)
				continue;
			return -1;
		}
		p += n;
		len -= (size_t)n;
	}
	return 0;
}

int
durable_write(const char *dir, const char *path, const char *const *parts,
    const size_t *lens, int nparts, int mode, char **cause)
{
	char *tmp;
	int fd, dfd, i, rc = -1;

	xasprintf(&tmp, "%s.tmp", path);
	if ((fd = open(tmp, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC,
	    mode)) == -1) {
		xasprintf(cause, "%s: %s", tmp, strerror(errno));
		goto out;
	}
	for (i = 0; i < nparts; i++)
		if (durable_write_all(fd, parts[i], lens[i]) != 0)
			break;
	if (i < nparts || fsync(fd) != 0) {
		xasprintf(cause, "%s: %s", tmp, strerror(errno));
		close(fd);
		unlink(tmp);
		goto out;
	}
	if (close(fd) != 0 || rename(tmp, path) != 0) {
		xasprintf(cause, "%s: %s", path, strerror(errno));
		unlink(tmp);
		goto out;
	}
	/* The rename is durable only once the directory is. */
	dfd = open(dir, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
	if (dfd == -1 || fsync(dfd) != 0) {
		xasprintf(cause, "%s: %s", dir, strerror(errno));
		if (dfd != -1)
			close(dfd);
		goto out;
	}
	close(dfd);
	rc = 0;
out:
	free(tmp);
	return rc;
}

int
durable_mkdirs(const char *path, int mode, char **cause)
{
	char *p, *s;

	p = xstrdup(path);
	for (s = p + 1; *s != '\0'; s++) {
		if (*s != '/')
			continue;
		*s = '\0';
		if (mkdir(p, (mode_t)mode) == -1 && errno != EEXIST)
			goto fail;
		*s = '/';
	}
	if (mkdir(p, (mode_t)mode) == -1 && errno != EEXIST)
		goto fail;
	free(p);
	return 0;
fail:
	xasprintf(cause, "mkdir %s: %s", p, strerror(errno));
	free(p);
	return -1;
}
