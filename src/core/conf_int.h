/*
 * conf_int.h: what conf.c (the parser) and conf_table.c (the option
 * table and the types of its values) share. Not for use outside them.
 */
#ifndef STOPCOCK_CONF_INT_H
#define STOPCOCK_CONF_INT_H

#include <stddef.h>

#include "stopcock/conf.h"

#define CONF_OPTIONS_MAX 128	/* rows the table may grow to */

enum conf_section {
	S_NONE = -1,
	S_DEFAULTS,
	S_GUARDRAIL,
	S_EXPERIMENT,
	S_DAEMON,
	S_REDIS,
	S_KAFKA,
	S_ALERTS,
	S_PAUSE,
	S_SYSLOG,
	S_WEBHOOK,
	S_ALERTMANAGER,
	S_PRODUCER,
	S_COUNT
};

enum conf_type {
	T_DOUBLE,	/* double in [min, max] */
	T_DURATION,	/* double seconds, "250ms", "5s", "2m", "1h" */
	T_U32,		/* uint32_t in [min, max] */
	T_INT,		/* int in [min, max] */
	T_BOOL,		/* int: yes/no */
	T_ENUM,		/* int: index into extra (a NULL-ended word list) */
	T_NAME,		/* char[CONF_NAME_MAX + 1], proto_name_ok */
	T_STRING,	/* char *: printable, at most max bytes */
	T_WORD,		/* char *: printable, no blanks, at most max bytes */
	T_TEMPLATE,	/* T_WORD whose %x escapes are the letters in extra */
	T_FACILITY,	/* char *: a syslog facility name */
	T_HOSTPORT,	/* char *: host:port or [v6]:port */
	T_PATH,		/* char *: absolute path, at most max bytes */
	T_ADDRESS,	/* char *: host:port or an absolute path */
	T_URL,		/* char *: http:// or https:// */
	T_SECRET,	/* char *: whsec_ + base64 */
	T_TOKEN,	/* char *: no blanks, min..max bytes */
	T_MARGIN,	/* guardrail margin: number or percentage */
	T_PLAN,		/* experiment arms: "control=50 treatment=50" */
	T_BROKERS,	/* char *: host:port[,host:port...] */
	T_TOPIC,	/* char *: a Kafka topic name, 1-max of A-Za-z0-9._- */
	T_KINDS,	/* uint32_t: a set of words of extra, bit i = word i */
	T_MODE		/* uint32_t: octal permission bits, 0 to max */
};

#define F_OPEN_MIN	0x01	/* min itself is outside the range */
#define F_OPEN_MAX	0x02
#define F_ZERO_OK	0x04	/* 0 means "unset" even outside the range */
#define F_REQUIRED	0x08
#define F_EMPTY_OFF	0x10	/* string: an empty value turns it off (NULL) */

struct conf_option {
	enum conf_section section;
	const char	*key;
	enum conf_type	 type;
	size_t		 offset;
	double		 min, max;
	int		 flags;
	const char	*def;		/* parsed like a value; NULL: unset */
	const void	*extra;
	const char	*help;
};

struct conf_section_info {
	const char	*name;
	int		 named;		/* [kind NAME], any number of them */
};

extern const struct conf_section_info conf_sections[S_COUNT];
extern const struct conf_option conf_options[];
extern const int conf_noptions;
extern const char *const conf_tests[];	/* indexed by enum conf_test */

/*
 * Parse value v for option o into the struct at base. On failure returns
 * -1 with *why saying what was expected (the caller names key and line).
 */
int	conf_table_set(const struct conf_option *, void *base, const char *v,
	    char **why);
/* Apply the defaults of one section's options to the struct at base. */
void	conf_table_defaults(enum conf_section, void *base);
/* 1 for options stored as an allocated char *. */
int	conf_table_is_string(enum conf_type);

#endif
